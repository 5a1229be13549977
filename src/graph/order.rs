//! Dominators over the signal-carrying values of a graph.
//!
//! The vertices are values (tensors), with an edge from each signal input of
//! a node to each of its outputs, and a virtual root that feeds every value
//! no other signal reaches (graph inputs, dangling references). A value `d`
//! dominates `v` when every path from the root to `v` passes through `d`.
//! The immediate dominator of a merge's output is the tensor where its
//! inputs last shared a path: the fork of a residual block.

use petgraph::algo::dominators;
use petgraph::graph::{DiGraph, NodeIndex};

use crate::graph::{Graph, ValueId};

/// Immediate dominators of every signal value.
#[derive(Debug)]
pub struct Dominance {
    idom: Vec<Option<ValueId>>,
}

impl Dominance {
    /// Computes the dominator tree of `g`'s signal values.
    pub fn compute(g: &Graph) -> Dominance {
        let n_values = g.values.len();
        let mut dg: DiGraph<(), ()> = DiGraph::with_capacity(n_values + 1, n_values * 2);
        for _ in 0..=n_values {
            dg.add_node(());
        }
        let root = NodeIndex::new(n_values);
        let mut has_pred = vec![false; n_values];
        for &n in &g.order {
            let node = g.node(n);
            for input in g.signal_inputs(n) {
                for &out in &node.outputs {
                    if !g.value(out).is_static {
                        dg.add_edge(
                            NodeIndex::new(input.0 as usize),
                            NodeIndex::new(out.0 as usize),
                            (),
                        );
                        has_pred[out.0 as usize] = true;
                    }
                }
            }
        }
        for (i, v) in g.values.iter().enumerate() {
            if !v.is_static && !has_pred[i] {
                dg.add_edge(root, NodeIndex::new(i), ());
            }
        }
        let doms = dominators::simple_fast(&dg, root);
        let idom = (0..n_values)
            .map(|i| {
                doms.immediate_dominator(NodeIndex::new(i))
                    .filter(|d| *d != root)
                    .map(|d| ValueId(d.index() as u32))
            })
            .collect();
        Dominance { idom }
    }

    /// The immediate dominator of a value; `None` for the root's children,
    /// static values and values the root does not reach.
    pub fn idom(&self, v: ValueId) -> Option<ValueId> {
        self.idom[v.0 as usize]
    }

    /// Whether `d` dominates `v` (every value dominates itself).
    pub fn dominates(&self, d: ValueId, v: ValueId) -> bool {
        let mut cur = Some(v);
        while let Some(c) = cur {
            if c == d {
                return true;
            }
            cur = self.idom(c);
        }
        false
    }
}
