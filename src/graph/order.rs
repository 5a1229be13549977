//! Dominators over the signal-carrying values of a graph.
//!
//! The vertices are values (tensors), with an edge from each signal input of
//! a node to each of its outputs. A value `d` dominates `v` from a source `s`
//! when every path from `s` to `v` passes through `d`. The immediate
//! dominator of a merge's output is the tensor where its inputs last shared a
//! path: the fork of a residual block.
//!
//! One dominator tree is computed per signal source (each graph input, each
//! dangling reference). A side signal that joins a branch from another input
//! (an attention mask added to the scores) then does not hide the fork: from
//! the main input's point of view, the mask is a constant. The fork of a
//! value is taken from its *primary* source: of the sources that reach it,
//! the one that reaches the most values (the main input reaches everything a
//! mask reaches, and the layers before the first mask too).

use petgraph::algo::dominators;
use petgraph::graph::{DiGraph, NodeIndex};

use crate::graph::{Graph, ValueId};

/// Immediate dominators of every signal value, per signal source.
#[derive(Debug)]
pub struct Dominance {
    sources: Vec<ValueId>,
    idom: Vec<Vec<Option<ValueId>>>,
}

impl Dominance {
    /// Computes one dominator tree of `g`'s signal values per signal source.
    pub fn compute(g: &Graph) -> Dominance {
        let n_values = g.values.len();
        let mut dg: DiGraph<(), ()> = DiGraph::with_capacity(n_values, n_values * 2);
        for _ in 0..n_values {
            dg.add_node(());
        }
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
        let sources: Vec<ValueId> = (0..n_values)
            .filter(|&i| {
                !g.values[i].is_static && !has_pred[i] && !g.values[i].consumers.is_empty()
            })
            .map(|i| ValueId(i as u32))
            .collect();
        let mut trees: Vec<(ValueId, Vec<Option<ValueId>>, usize)> = sources
            .iter()
            .map(|&s| {
                let doms = dominators::simple_fast(&dg, NodeIndex::new(s.0 as usize));
                let tree: Vec<Option<ValueId>> = (0..n_values)
                    .map(|i| {
                        doms.immediate_dominator(NodeIndex::new(i))
                            .map(|d| ValueId(d.index() as u32))
                    })
                    .collect();
                let reach = tree.iter().filter(|d| d.is_some()).count();
                (s, tree, reach)
            })
            .collect();
        // Primary sources first: the widest reach, then value order.
        trees.sort_by(|a, b| b.2.cmp(&a.2).then(a.0.cmp(&b.0)));
        let sources = trees.iter().map(|t| t.0).collect();
        let idom = trees.into_iter().map(|t| t.1).collect();
        Dominance { sources, idom }
    }

    /// The immediate dominator of `v` seen from its primary source: the fork
    /// of a merge whose output is `v`. `None` for a source itself and for
    /// static or unreached values.
    pub fn fork(&self, v: ValueId) -> Option<ValueId> {
        for (tree, &source) in self.idom.iter().zip(&self.sources) {
            if source == v {
                return None;
            }
            if let Some(d) = tree[v.0 as usize] {
                return Some(d);
            }
        }
        None
    }
}
