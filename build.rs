//! Compiles `proto/onnx.proto` with protox (a protobuf compiler written in
//! Rust), so that building shunt never needs a system `protoc`.

fn main() -> Result<(), Box<dyn std::error::Error>> {
    println!("cargo:rerun-if-changed=proto/onnx.proto");
    let descriptors = protox::compile(["proto/onnx.proto"], ["proto"])?;
    prost_build::Config::new()
        // Tensor payloads are kept as `bytes::Bytes` slices of the file buffer:
        // decoding a model with 100 MB of weights then copies none of them.
        .bytes([".onnx.TensorProto.raw_data"])
        // An attribute holds a tensor or a sparse tensor only rarely, but
        // inline they made every attribute 1.4 KB: a 13,000-node graph then
        // spent more time in the allocator and page faults than in decoding.
        // Boxed, an attribute is about 0.5 KB.
        .boxed(".onnx.AttributeProto.t")
        .boxed(".onnx.AttributeProto.sparse_tensor")
        .compile_fds(descriptors)?;
    Ok(())
}
