//! What rules write with: derived names, nodes in the default domain,
//! new initializers, checked attribute and input access, and the few
//! standard ops whose form depends on the opset.

use rustc_hash::{FxHashMap, FxHashSet};

use crate::error::{Error, Result};
use crate::load::{ExternalData, tensor};
use crate::proto::{
    AttributeProto, GraphProto, NodeProto, TensorProto, attribute_proto, tensor_shape_proto,
    type_proto,
};

use super::{Origin, constants, malformed, names_of};

/// The most bytes a rule reads of one small constant (a scale, a zero point,
/// a shape); larger ones are weights and are read only by rules that re-lay
/// them, through [`Ctx::weight_f32`].
const SMALL_CONSTANT_BYTES: u64 = 1 << 20;
/// The most bytes a rule reads of one weight it must re-lay.
const WEIGHT_BYTES: u64 = 1 << 30;

/// The state rules share while a model is lowered.
pub struct Ctx<'a> {
    /// The default domain's opset of the model.
    pub opset: i64,
    graph: &'a GraphProto,
    nodes: &'a [NodeProto],
    /// Every name the model uses, built on the first fresh name: a model
    /// whose rules all keep their nodes never pays for it.
    names: Option<FxHashSet<String>>,
    consts: std::cell::OnceCell<FxHashMap<&'a str, &'a TensorProto>>,
    external: &'a ExternalData,
    /// The node being lowered and its position; its [`Origin`] is built
    /// when a rule first asks (a rule that keeps its node never does).
    current: Option<(usize, &'a NodeProto)>,
    origin: std::cell::OnceCell<Origin>,
    emitted: usize,
    initializers: Vec<TensorProto>,
    needs_opset: bool,
    nchwc_block: Option<i64>,
    notes: Vec<crate::error::Diagnostic>,
    /// Ranks declared for graph inputs, outputs and `value_info`, and the
    /// producer of each tensor, for [`Ctx::rank`] (built on first use).
    declared_ranks: std::cell::OnceCell<FxHashMap<&'a str, usize>>,
    producers: std::cell::OnceCell<FxHashMap<&'a str, &'a NodeProto>>,
}

impl<'a> Ctx<'a> {
    pub(super) fn new(
        graph: &'a GraphProto,
        nodes: &'a [NodeProto],
        opset: i64,
        external: &'a ExternalData,
    ) -> Ctx<'a> {
        Ctx {
            opset,
            graph,
            nodes,
            names: None,
            consts: std::cell::OnceCell::new(),
            external,
            current: None,
            origin: std::cell::OnceCell::new(),
            emitted: 0,
            initializers: Vec::new(),
            needs_opset: false,
            nchwc_block: None,
            notes: Vec::new(),
            declared_ranks: std::cell::OnceCell::new(),
            producers: std::cell::OnceCell::new(),
        }
    }

    pub(super) fn begin(&mut self, index: usize, node: &'a NodeProto) {
        self.current = Some((index, node));
        self.origin = std::cell::OnceCell::new();
        self.emitted = 0;
    }

    pub(super) fn finish(self) -> (Vec<TensorProto>, bool, Vec<crate::error::Diagnostic>) {
        (self.initializers, self.needs_opset, self.notes)
    }

    /// Records a note for the report about the node being lowered, once per
    /// distinct message.
    pub fn note(&mut self, message: impl Into<String>) {
        let message = message.into();
        if !self.notes.iter().any(|n| n.message == message) {
            let node = self.origin().name.clone();
            self.notes.push(crate::error::Diagnostic::note(Some(&node), message));
        }
    }

    /// The node being lowered.
    pub fn origin(&self) -> &Origin {
        self.origin.get_or_init(|| {
            let (index, node) = self.current.expect("a rule runs between begin and finish");
            Origin {
                name: if node.name.is_empty() {
                    format!("{}#{index}", node.op_type)
                } else {
                    node.name.clone()
                },
                op_type: node.op_type.clone(),
                domain: node.domain.clone(),
                index,
            }
        })
    }

    /// An error naming the node being lowered.
    pub fn bad(&self, message: impl std::fmt::Display) -> Error {
        malformed(self.origin(), message)
    }

    /// A fresh name derived from the node being lowered: `{node}/lowered/{hint}`.
    pub fn name(&mut self, hint: &str) -> String {
        let base = format!("{}/lowered/{hint}", self.origin().name);
        let mut candidate = base.clone();
        let mut k = 1;
        let names = self.names.get_or_insert_with(|| names_of(self.graph, self.nodes));
        while names.contains(&candidate) {
            candidate = format!("{base}_{k}");
            k += 1;
        }
        names.insert(candidate.clone());
        candidate
    }

    /// A node in the default domain, named after the node being lowered.
    pub fn node(
        &mut self,
        op_type: &str,
        inputs: &[&str],
        outputs: &[&str],
        attribute: Vec<AttributeProto>,
    ) -> NodeProto {
        self.needs_opset = true;
        self.emitted += 1;
        let name = self.name(&op_type.to_ascii_lowercase());
        NodeProto {
            input: inputs.iter().map(|s| (*s).to_owned()).collect(),
            output: outputs.iter().map(|s| (*s).to_owned()).collect(),
            name,
            op_type: op_type.to_owned(),
            domain: String::new(),
            attribute,
            doc_string: String::new(),
        }
    }

    /// A node with one fresh output named after `hint`; returns the node and
    /// the output's name.
    pub fn node1(
        &mut self,
        op_type: &str,
        inputs: &[&str],
        hint: &str,
        attribute: Vec<AttributeProto>,
    ) -> (NodeProto, String) {
        let out = self.name(hint);
        let n = self.node(op_type, inputs, &[&out], attribute);
        (n, out)
    }

    /// A new float32 initializer; returns its name.
    pub fn init_f32(&mut self, hint: &str, dims: &[i64], values: Vec<f32>) -> String {
        let name = self.name(hint);
        self.initializers.push(TensorProto {
            name: name.clone(),
            dims: dims.to_vec(),
            data_type: 1,
            float_data: values,
            ..Default::default()
        });
        name
    }

    /// A new int64 initializer; returns its name.
    pub fn init_i64(&mut self, hint: &str, dims: &[i64], values: Vec<i64>) -> String {
        let name = self.name(hint);
        self.initializers.push(TensorProto {
            name: name.clone(),
            dims: dims.to_vec(),
            data_type: 7,
            int64_data: values,
            ..Default::default()
        });
        name
    }

    /// A new initializer given whole (its name is replaced by a fresh one
    /// derived from `hint`); returns the name.
    pub fn init(&mut self, hint: &str, mut t: TensorProto) -> String {
        let name = self.name(hint);
        t.name = name.clone();
        self.initializers.push(t);
        name
    }

    /// The tensor of a constant (initializer or Constant node), if `name` is one.
    pub fn constant(&self, name: &str) -> Option<&'a TensorProto> {
        self.consts.get_or_init(|| constants(self.graph, self.nodes)).get(name).copied()
    }

    /// A small constant's values as `f32`; `None` when `name` is not a constant.
    pub fn const_f32(&self, name: &str) -> Result<Option<Vec<f32>>> {
        let Some(t) = self.constant(name) else { return Ok(None) };
        tensor::read_f32(t, self.external, SMALL_CONSTANT_BYTES)
            .map(Some)
            .map_err(|e| self.bad(format!("cannot read '{name}': {}", e.message())))
    }

    /// A small integer constant's values; `None` when `name` is not a constant.
    pub fn const_i64(&self, name: &str) -> Result<Option<Vec<i64>>> {
        let Some(t) = self.constant(name) else { return Ok(None) };
        tensor::read_i64(t, self.external, SMALL_CONSTANT_BYTES)
            .map(Some)
            .map_err(|e| self.bad(format!("cannot read '{name}': {}", e.message())))
    }

    /// A weight's values as `f32`, for rules that must re-lay a weight.
    pub fn weight_f32(&self, name: &str) -> Result<Option<Vec<f32>>> {
        let Some(t) = self.constant(name) else { return Ok(None) };
        tensor::read_f32(t, self.external, WEIGHT_BYTES)
            .map(Some)
            .map_err(|e| self.bad(format!("cannot read '{name}': {}", e.message())))
    }

    /// Input `slot` of `node`, when present and not omitted.
    pub fn input<'n>(&self, node: &'n NodeProto, slot: usize) -> Option<&'n str> {
        node.input.get(slot).map(String::as_str).filter(|s| !s.is_empty())
    }

    /// Input `slot`, which must be present.
    pub fn required<'n>(&self, node: &'n NodeProto, slot: usize) -> Result<&'n str> {
        self.input(node, slot).ok_or_else(|| self.bad(format!("input {slot} is missing")))
    }

    /// Checks the number of inputs and outputs (counting omitted optional ones).
    pub fn arity(
        &self,
        node: &NodeProto,
        inputs: (usize, usize),
        outputs: (usize, usize),
    ) -> Result<()> {
        let check = |what: &str, n: usize, (lo, hi): (usize, usize)| {
            if n < lo || n > hi {
                let want = if lo == hi { lo.to_string() } else { format!("{lo} to {hi}") };
                return Err(self.bad(format!("expects {want} {what}, has {n}")));
            }
            Ok(())
        };
        check("inputs", node.input.len(), inputs)?;
        check("outputs", node.output.len(), outputs)?;
        for slot in 0..inputs.0 {
            self.required(node, slot)?;
        }
        if node.output.first().is_none_or(String::is_empty) {
            return Err(self.bad("output 0 has no name"));
        }
        Ok(())
    }

    fn typed<'n>(
        &self,
        node: &'n NodeProto,
        name: &str,
        want: attribute_proto::AttributeType,
    ) -> Result<Option<&'n AttributeProto>> {
        let Some(a) = node.attribute.iter().find(|a| a.name == name) else { return Ok(None) };
        if a.r#type != want as i32 && a.r#type != 0 {
            return Err(self.bad(format!(
                "attribute '{name}' is of type {}, expected {}",
                attribute_proto::AttributeType::try_from(a.r#type)
                    .map_or_else(|_| a.r#type.to_string(), |t| t.as_str_name().to_owned()),
                want.as_str_name()
            )));
        }
        Ok(Some(a))
    }

    /// An integer attribute, type-checked.
    pub fn attr_int(&self, node: &NodeProto, name: &str) -> Result<Option<i64>> {
        Ok(self.typed(node, name, attribute_proto::AttributeType::Int)?.map(|a| a.i))
    }

    /// A float attribute, type-checked.
    pub fn attr_float(&self, node: &NodeProto, name: &str) -> Result<Option<f32>> {
        Ok(self.typed(node, name, attribute_proto::AttributeType::Float)?.map(|a| a.f))
    }

    /// An integer-list attribute, type-checked.
    pub fn attr_ints(&self, node: &NodeProto, name: &str) -> Result<Option<Vec<i64>>> {
        Ok(self.typed(node, name, attribute_proto::AttributeType::Ints)?.map(|a| a.ints.clone()))
    }

    /// A float-list attribute, type-checked.
    pub fn attr_floats(&self, node: &NodeProto, name: &str) -> Result<Option<Vec<f32>>> {
        Ok(self
            .typed(node, name, attribute_proto::AttributeType::Floats)?
            .map(|a| a.floats.clone()))
    }

    /// A string attribute, type-checked and UTF-8.
    pub fn attr_string(&self, node: &NodeProto, name: &str) -> Result<Option<String>> {
        match self.typed(node, name, attribute_proto::AttributeType::String)? {
            None => Ok(None),
            Some(a) => String::from_utf8(a.s.clone())
                .map(Some)
                .map_err(|_| self.bad(format!("attribute '{name}' is not UTF-8"))),
        }
    }

    /// `Unsqueeze(x, axes)`: axes as an attribute before opset 13, an input after.
    pub fn unsqueeze(&mut self, x: &str, axes: &[i64], out: &str) -> Vec<NodeProto> {
        if self.opset < 13 {
            return vec![self.node("Unsqueeze", &[x], &[out], vec![ints("axes", axes)])];
        }
        let a = self.init_i64("axes", &[axes.len() as i64], axes.to_vec());
        vec![self.node("Unsqueeze", &[x, &a], &[out], vec![])]
    }

    /// `ReduceMean(x, axes, keepdims)`: axes as an attribute before opset 18,
    /// an input after.
    pub fn reduce_mean(
        &mut self,
        x: &str,
        axes: &[i64],
        keepdims: bool,
        out: &str,
    ) -> Vec<NodeProto> {
        let keep = int("keepdims", keepdims as i64);
        if self.opset < 18 {
            return vec![self.node("ReduceMean", &[x], &[out], vec![ints("axes", axes), keep])];
        }
        let a = self.init_i64("axes", &[axes.len() as i64], axes.to_vec());
        vec![self.node("ReduceMean", &[x, &a], &[out], vec![keep])]
    }

    /// `Clip(x, lo, hi)`: bounds as attributes before opset 11, inputs after.
    pub fn clip(&mut self, x: &str, lo: f32, hi: f32, out: &str) -> Vec<NodeProto> {
        if self.opset < 11 {
            return vec![self.node("Clip", &[x], &[out], vec![float("min", lo), float("max", hi)])];
        }
        let l = self.init_f32("min", &[], vec![lo]);
        let h = self.init_f32("max", &[], vec![hi]);
        vec![self.node("Clip", &[x, &l, &h], &[out], vec![])]
    }

    /// Every node of the model being lowered, as it was before lowering, for
    /// rules that must look beyond their node (the blocked-layout region of
    /// onnxruntime's NCHWc ops).
    pub fn nodes(&self) -> &'a [NodeProto] {
        self.nodes
    }

    /// Sets the NCHWc block size the caller knows the model was written with
    /// (that of the machine whose onnxruntime optimised it), for the models
    /// whose shapes fit both block sizes.
    pub fn set_nchwc_block(&mut self, block: Option<i64>) {
        self.nchwc_block = block;
    }

    /// The NCHWc block size the caller gave, if any.
    pub fn nchwc_block(&self) -> Option<i64> {
        self.nchwc_block
    }

    /// The shape a tensor is declared with: a graph input, output or
    /// `value_info` entry (`None` for a dimension that is not a number), or a
    /// constant's dims. `None` when nothing declares it.
    pub fn declared_shape(&self, name: &str) -> Option<Vec<Option<i64>>> {
        if let Some(t) = self.constant(name) {
            return Some(t.dims.iter().map(|&d| Some(d)).collect());
        }
        let g = self.graph;
        let v = g.input.iter().chain(&g.output).chain(&g.value_info).find(|v| v.name == name)?;
        let Some(type_proto::Value::TensorType(tt)) = v.r#type.as_ref()?.value.as_ref() else {
            return None;
        };
        let dims = tt.shape.as_ref()?.dim.iter().map(|d| match d.value {
            Some(tensor_shape_proto::dimension::Value::DimValue(v)) if v >= 0 => Some(v),
            _ => None,
        });
        Some(dims.collect())
    }

    /// The rank of a tensor when it is known without running the model: a
    /// constant's, a declared one (graph input, output, `value_info`), or one
    /// followed through `Cast`, `Identity` and the reductions with
    /// `keepdims = 0` and constant axes. `None` when unknown.
    pub fn rank(&self, name: &str) -> Option<usize> {
        self.rank_at(name, 0)
    }

    fn rank_at(&self, name: &str, depth: usize) -> Option<usize> {
        if let Some(t) = self.constant(name) {
            return Some(t.dims.len());
        }
        let declared = self.declared_ranks.get_or_init(|| {
            let g = self.graph;
            g.input
                .iter()
                .chain(&g.output)
                .chain(&g.value_info)
                .filter_map(|v| Some((v.name.as_str(), declared_rank(v)?)))
                .collect()
        });
        if let Some(&r) = declared.get(name) {
            return Some(r);
        }
        let producers = self.producers.get_or_init(|| {
            self.nodes.iter().flat_map(|n| n.output.iter().map(move |o| (o.as_str(), n))).collect()
        });
        let node = producers.get(name).filter(|_| depth < 64)?;
        let input = node.input.first()?;
        match node.op_type.as_str() {
            "Cast" | "Identity" => self.rank_at(input, depth + 1),
            op if op.starts_with("Reduce") => {
                let keep = crate::load::attr::int(&node.attribute, "keepdims").unwrap_or(1);
                let r = self.rank_at(input, depth + 1)?;
                if keep != 0 {
                    return Some(r);
                }
                let axes = match crate::load::attr::ints(&node.attribute, "axes") {
                    Some(a) => a.len(),
                    None => {
                        self.constant(node.input.get(1)?)?.dims.iter().product::<i64>() as usize
                    }
                };
                r.checked_sub(axes)
            }
            _ => None,
        }
    }
}

/// The rank a `ValueInfoProto` declares, if it declares a tensor shape.
fn declared_rank(v: &crate::proto::ValueInfoProto) -> Option<usize> {
    use crate::proto::type_proto::Value;
    match v.r#type.as_ref()?.value.as_ref()? {
        Value::TensorType(t) => Some(t.shape.as_ref()?.dim.len()),
        _ => None,
    }
}

/// An integer attribute.
pub(crate) fn int(name: &str, v: i64) -> AttributeProto {
    AttributeProto {
        name: name.to_owned(),
        r#type: attribute_proto::AttributeType::Int as i32,
        i: v,
        ..Default::default()
    }
}

/// A float attribute.
pub(crate) fn float(name: &str, v: f32) -> AttributeProto {
    AttributeProto {
        name: name.to_owned(),
        r#type: attribute_proto::AttributeType::Float as i32,
        f: v,
        ..Default::default()
    }
}

/// An integer-list attribute.
pub(crate) fn ints(name: &str, v: &[i64]) -> AttributeProto {
    AttributeProto {
        name: name.to_owned(),
        r#type: attribute_proto::AttributeType::Ints as i32,
        ints: v.to_vec(),
        ..Default::default()
    }
}

/// A float-list attribute (rules pass float lists on as they are; tests build them).
#[cfg(test)]
pub(crate) fn floats(name: &str, v: &[f32]) -> AttributeProto {
    AttributeProto {
        name: name.to_owned(),
        r#type: attribute_proto::AttributeType::Floats as i32,
        floats: v.to_vec(),
        ..Default::default()
    }
}

/// A string attribute.
pub(crate) fn string(name: &str, v: &str) -> AttributeProto {
    AttributeProto {
        name: name.to_owned(),
        r#type: attribute_proto::AttributeType::String as i32,
        s: v.as_bytes().to_vec(),
        ..Default::default()
    }
}
