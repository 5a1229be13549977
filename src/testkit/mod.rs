//! Builders for small ONNX models used by tests, fixtures and benchmarks.
