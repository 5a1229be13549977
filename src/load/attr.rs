//! Typed access to node attributes: the only place that reads
//! [`AttributeProto`] values.

use crate::proto::{AttributeProto, GraphProto, NodeProto, TensorProto};

/// Looks up an attribute by name.
pub fn find<'a>(attrs: &'a [AttributeProto], name: &str) -> Option<&'a AttributeProto> {
    attrs.iter().find(|a| a.name == name)
}

/// An integer attribute.
pub fn int(attrs: &[AttributeProto], name: &str) -> Option<i64> {
    find(attrs, name).map(|a| a.i)
}

/// A list-of-integers attribute.
pub fn ints<'a>(attrs: &'a [AttributeProto], name: &str) -> Option<&'a [i64]> {
    find(attrs, name).map(|a| a.ints.as_slice())
}

/// A string attribute, if it is valid UTF-8.
pub fn string<'a>(attrs: &'a [AttributeProto], name: &str) -> Option<&'a str> {
    find(attrs, name).and_then(|a| std::str::from_utf8(&a.s).ok())
}

/// A tensor attribute (the `value` of a Constant node, for one).
pub fn tensor<'a>(attrs: &'a [AttributeProto], name: &str) -> Option<&'a TensorProto> {
    find(attrs, name).and_then(|a| a.t.as_deref())
}

/// Every subgraph a node carries (If branches, Loop and Scan bodies), with
/// the attribute that holds it.
pub fn subgraphs(node: &NodeProto) -> impl Iterator<Item = (&str, &GraphProto)> {
    graphs(&node.attribute)
}

/// Every subgraph among a node's attributes, with the attribute that holds it.
pub fn graphs(attrs: &[AttributeProto]) -> impl Iterator<Item = (&str, &GraphProto)> {
    attrs.iter().flat_map(|a| a.g.iter().chain(a.graphs.iter()).map(move |g| (a.name.as_str(), g)))
}
