//! Transformer contrib operators (onnxruntime's `com.microsoft` domain,
//! as its transformer optimiser writes them): the merges fused into
//! normalisations, fused activations and fused linear layers.
//!
//! Semantics: onnxruntime's contrib operator documentation
//! (docs/ContribOperators.md of the pinned onnxruntime release).

use crate::error::Result;
use crate::lower::emit::Ctx;
use crate::lower::{MS_DOMAIN, Rewrite, Rule};
use crate::proto::NodeProto;

pub(super) const RULES: &[(&str, &str, Rule)] = &[(MS_DOMAIN, "BiasAdd", bias_add)];

/// `BiasAdd(X, bias, skip) = X + bias + skip` ([Q2] family; contrib docs,
/// "com.microsoft.BiasAdd"): the bias add, then the merge with the skip.
fn bias_add(ctx: &mut Ctx<'_>, node: &NodeProto) -> Result<Rewrite> {
    ctx.arity(node, (3, 3), (1, 1))?;
    let x = ctx.required(node, 0)?;
    let bias = ctx.required(node, 1)?;
    let skip = ctx.required(node, 2)?;
    let (biased_node, biased) = ctx.node1("Add", &[x, bias], "biased", vec![]);
    let merge = ctx.node("Add", &[&biased, skip], &[&node.output[0]], vec![]);
    Ok(Rewrite::Into(vec![biased_node, merge]))
}
