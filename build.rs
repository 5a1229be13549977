//! Compiles `proto/onnx.proto` with protox (a protobuf compiler written in
//! Rust), so that building shunt never needs a system `protoc`.

fn main() -> Result<(), Box<dyn std::error::Error>> {
    println!("cargo:rerun-if-changed=proto/onnx.proto");
    let descriptors = protox::compile(["proto/onnx.proto"], ["proto"])?;
    prost_build::Config::new()
        // Tensor payloads are kept as `bytes::Bytes` slices of the file buffer:
        // decoding a model with 100 MB of weights then copies none of them.
        .bytes([".onnx.TensorProto.raw_data"])
        .compile_fds(descriptors)?;
    Ok(())
}
