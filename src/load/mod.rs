//! From a path to a decoded [`ModelProto`], with every external-data reference
//! checked against the model's folder.
//!
//! Nothing here reads tensor payloads that live in external files: the scan
//! only needs their metadata. [`tensor`] reads a payload on request, through
//! the same checks.

pub mod attr;
pub mod tensor;

use std::fs;
use std::path::{Component, Path, PathBuf};

use bytes::Bytes;
use prost::Message;

use crate::error::{Error, ErrorKind, Result};
use crate::proto::{ModelProto, TensorProto, tensor_proto::DataLocation};

/// Limits checked before anything large is read or allocated.
#[derive(Debug, Clone)]
pub struct LoadConfig {
    /// The largest model file (the protobuf itself) that is read.
    pub max_file_bytes: u64,
}

/// A decoded model and where it came from.
#[derive(Debug)]
pub struct LoadedModel {
    /// The model file.
    pub path: PathBuf,
    /// Size of the model file in bytes.
    pub file_bytes: u64,
    /// The decoded model.
    pub model: ModelProto,
    /// Resolves external data of this model's tensors.
    pub external: ExternalData,
}

/// The newest ONNX IR version this build knows of (IR 11 is ONNX 1.17+).
pub const NEWEST_IR_VERSION: i64 = 11;

/// Reads and decodes `path`, and checks every external-data reference.
pub fn load(path: &Path, config: &LoadConfig) -> Result<LoadedModel> {
    load_inner(path, config).map_err(|e| e.at(path))
}

fn load_inner(path: &Path, config: &LoadConfig) -> Result<LoadedModel> {
    let meta = fs::metadata(path).map_err(|e| Error::new(ErrorKind::Io, io_message(&e)))?;
    if meta.is_dir() {
        return Err(Error::new(ErrorKind::Io, "is a folder, not a model file"));
    }
    if !meta.is_file() {
        return Err(Error::new(ErrorKind::Io, "is not a regular file"));
    }
    if meta.len() > config.max_file_bytes {
        return Err(Error::new(
            ErrorKind::Limit,
            format!(
                "the file is {} bytes, larger than the limit of {} bytes (raise it with --max-file-bytes)",
                meta.len(),
                config.max_file_bytes
            ),
        ));
    }
    let bytes = fs::read(path).map_err(|e| Error::new(ErrorKind::Io, io_message(&e)))?;
    let file_bytes = bytes.len() as u64;
    let model = decode(Bytes::from(bytes))?;
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    let external = ExternalData::new(&dir)?;
    check_external_refs(&model, &external)?;
    check_payloads(&model, &external)?;
    Ok(LoadedModel { path: path.to_path_buf(), file_bytes, model, external })
}

/// Decodes protobuf bytes into a model and checks the few things every
/// ONNX model must have: a graph, an IR version and an opset.
pub fn decode(bytes: Bytes) -> Result<ModelProto> {
    if bytes.is_empty() {
        return Err(Error::new(ErrorKind::Decode, "the file is empty, not an ONNX model"));
    }
    let model = ModelProto::decode(bytes).map_err(|e| {
        // prost stops at 100 levels of nested messages; each subgraph level
        // (node, attribute, graph) takes three, so about 30 nested If bodies.
        if e.to_string().contains("recursion limit") {
            return Error::new(
                ErrorKind::Limit,
                "messages are nested more than 100 levels deep (subgraphs inside subgraphs): refused",
            );
        }
        Error::new(
            ErrorKind::Decode,
            format!("not an ONNX model, or a truncated one: protobuf decoding failed ({e})"),
        )
    })?;
    if model.graph.is_none() {
        return Err(Error::new(ErrorKind::Decode, "not an ONNX model: it has no graph"));
    }
    if model.ir_version < 3 {
        return Err(Error::new(
            ErrorKind::Decode,
            format!(
                "not an ONNX model shunt can read: ir_version is {} (3 to {NEWEST_IR_VERSION} are supported)",
                model.ir_version
            ),
        ));
    }
    if model.opset_import.is_empty() {
        return Err(Error::new(
            ErrorKind::Decode,
            "not a complete ONNX model: it imports no operator set (truncated file?)",
        ));
    }
    Ok(model)
}

/// Where the external data of one tensor lives, once checked.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ExternalRef {
    /// The file, inside the model's folder.
    pub file: PathBuf,
    /// Offset of the payload in the file.
    pub offset: u64,
    /// Length of the payload in bytes.
    pub length: u64,
    /// The SHA-1 the model declares for the file, if any.
    pub checksum: Option<[u8; 20]>,
}

/// Resolves external-data locations, never outside the model's folder.
#[derive(Debug, Clone)]
pub struct ExternalData {
    dir: PathBuf,
    canonical_dir: Option<PathBuf>,
}

impl ExternalData {
    fn new(dir: &Path) -> Result<ExternalData> {
        Ok(ExternalData { dir: dir.to_path_buf(), canonical_dir: fs::canonicalize(dir).ok() })
    }

    /// An `ExternalData` for a model that did not come from a file: every
    /// external reference is refused.
    pub fn none() -> ExternalData {
        ExternalData { dir: PathBuf::new(), canonical_dir: None }
    }

    /// Checks the external-data entries of `tensor` ([O3] in the ONNX IR
    /// specification: `location`, `offset`, `length`, optional `checksum`)
    /// and returns where its payload is. `Ok(None)` for a tensor stored inline.
    pub fn resolve(&self, tensor: &TensorProto) -> Result<Option<ExternalRef>> {
        if tensor.data_location != DataLocation::External as i32 {
            return Ok(None);
        }
        let what = || format!("tensor '{}': external data", tensor.name);
        let mut location = None;
        let mut offset = 0u64;
        let mut length = None;
        let mut checksum = None;
        for entry in &tensor.external_data {
            match entry.key.as_str() {
                "location" => location = Some(entry.value.as_str()),
                "offset" => {
                    offset = parse_u64(&entry.value)
                        .ok_or_else(|| bad(&what(), "offset is not a number"))?
                }
                "length" => {
                    length = Some(
                        parse_u64(&entry.value)
                            .ok_or_else(|| bad(&what(), "length is not a number"))?,
                    )
                }
                "checksum" => {
                    checksum = Some(parse_sha1(&entry.value).ok_or_else(|| {
                        bad(&what(), "checksum is not a SHA-1 digest (40 hexadecimal digits)")
                    })?)
                }
                _ => {}
            }
        }
        let location = location.ok_or_else(|| bad(&what(), "has no location"))?;
        let relative = check_relative(location)
            .map_err(|m| bad(&what(), &format!("location '{location}' {m}")))?;
        let Some(canonical_dir) = &self.canonical_dir else {
            return Err(bad(&what(), "cannot be resolved: the model has no folder"));
        };
        let joined = self.dir.join(relative);
        let file = fs::canonicalize(&joined).map_err(|e| {
            bad(&what(), &format!("file '{location}' cannot be opened: {}", io_message(&e)))
        })?;
        if !file.starts_with(canonical_dir) {
            return Err(bad(
                &what(),
                &format!("location '{location}' leads outside the model's folder"),
            ));
        }
        let meta = fs::metadata(&file)
            .map_err(|e| bad(&what(), &format!("file '{location}': {}", io_message(&e))))?;
        if !meta.is_file() {
            return Err(bad(&what(), &format!("location '{location}' is not a regular file")));
        }
        let size = meta.len();
        let length = length.unwrap_or(size.saturating_sub(offset));
        let end =
            offset.checked_add(length).ok_or_else(|| bad(&what(), "offset + length overflows"))?;
        if end > size {
            return Err(bad(
                &what(),
                &format!(
                    "offset {offset} + length {length} is past the end of '{location}' ({size} bytes)"
                ),
            ));
        }
        Ok(Some(ExternalRef { file, offset, length, checksum }))
    }
}

/// Verifies the `checksum` of every external tensor that declares one,
/// reading each file once in bounded chunks. The ONNX IR specification [O3]
/// defines the checksum as the SHA-1 of the file named by `location`; a digest
/// of just the tensor's byte range is accepted too, since writers differ.
/// Only the audit calls this: the scan reads no external payload.
pub fn verify_checksums(model: &ModelProto, external: &ExternalData) -> Result<()> {
    let Some(graph) = &model.graph else { return Ok(()) };
    let mut refs = Vec::new();
    let mut result = Ok(());
    tensor::for_each_tensor(graph, &mut |t| {
        if result.is_err() {
            return;
        }
        match external.resolve(t) {
            Ok(Some(r)) if r.checksum.is_some() => refs.push((t.name.clone(), r)),
            Ok(_) => {}
            Err(e) => result = Err(e),
        }
    });
    result?;
    let mut whole: Vec<(PathBuf, [u8; 20])> = Vec::new();
    for (name, r) in refs {
        let expected = r.checksum.expect("only tensors with a checksum are kept");
        let file_digest = match whole.iter().find(|(f, _)| *f == r.file) {
            Some((_, d)) => *d,
            None => {
                let d = sha1_of(&r.file, 0, u64::MAX)?;
                whole.push((r.file.clone(), d));
                d
            }
        };
        if file_digest == expected || sha1_of(&r.file, r.offset, r.length)? == expected {
            continue;
        }
        return Err(bad(
            &format!("tensor '{name}': external data"),
            &format!(
                "checksum mismatch: the model declares SHA-1 {}, but '{}' has {}",
                hex(&expected),
                r.file.display(),
                hex(&file_digest)
            ),
        ));
    }
    Ok(())
}

/// SHA-1 of `length` bytes of `file` from `offset` (to the end at most).
fn sha1_of(file: &Path, offset: u64, length: u64) -> Result<[u8; 20]> {
    use sha1::{Digest, Sha1};
    use std::io::{Read, Seek, SeekFrom};
    let fail = |e: std::io::Error| {
        bad(&format!("external data file '{}'", file.display()), &io_message(&e))
    };
    let mut f = fs::File::open(file).map_err(fail)?;
    f.seek(SeekFrom::Start(offset)).map_err(fail)?;
    let mut hasher = Sha1::new();
    let mut buf = vec![0u8; 1 << 20];
    let mut left = length;
    while left > 0 {
        let want = buf.len().min(usize::try_from(left).unwrap_or(usize::MAX));
        let n = f.read(&mut buf[..want]).map_err(fail)?;
        if n == 0 {
            break;
        }
        hasher.update(&buf[..n]);
        left -= n as u64;
    }
    Ok(hasher.finalize().into())
}

fn parse_sha1(s: &str) -> Option<[u8; 20]> {
    let s = s.trim();
    if s.len() != 40 || !s.is_ascii() {
        return None;
    }
    let mut out = [0u8; 20];
    for (i, byte) in out.iter_mut().enumerate() {
        *byte = u8::from_str_radix(&s[2 * i..2 * i + 2], 16).ok()?;
    }
    Some(out)
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

/// Checks every tensor of the model (initializers, Constant values, also
/// inside subgraphs) that keeps its payload in an external file.
fn check_external_refs(model: &ModelProto, external: &ExternalData) -> Result<()> {
    let Some(graph) = &model.graph else { return Ok(()) };
    let mut result = Ok(());
    tensor::for_each_tensor(graph, &mut |t| {
        if result.is_ok()
            && let Err(e) = external.resolve(t)
        {
            result = Err(e);
        }
    });
    result
}

/// Checks that every stored tensor's payload has exactly the size its dims
/// and element type declare, before anything reads it: a file that declares a
/// tensor of 10^12 elements without holding them is refused here.
pub fn check_payloads(model: &ModelProto, external: &ExternalData) -> Result<()> {
    let Some(graph) = &model.graph else { return Ok(()) };
    let mut result = Ok(());
    tensor::for_each_tensor(graph, &mut |t| {
        if result.is_ok() {
            result = check_payload(t, external);
        }
    });
    result
}

fn check_payload(t: &TensorProto, external: &ExternalData) -> Result<()> {
    use crate::proto::tensor_proto::DataType as D;
    let invalid = |m: String| Error::new(ErrorKind::Invalid, format!("tensor '{}' {m}", t.name));
    let Some(n) = tensor::element_count(&t.dims) else {
        return Err(invalid(format!(
            "has invalid dims {:?} (negative, or more elements than can be counted)",
            t.dims
        )));
    };
    let Ok(dtype) = D::try_from(t.data_type) else {
        return Err(invalid(format!("has an unknown element type {}", t.data_type)));
    };
    if dtype == D::Undefined {
        return Err(invalid("has no element type".to_owned()));
    }
    let want_bytes = tensor::expected_bytes(t);
    if want_bytes.is_none() && tensor::dtype_bits(t.data_type).is_some() {
        return Err(invalid(format!(
            "declares {n} elements of {}: more bytes than can be counted",
            tensor::dtype_name(t.data_type)
        )));
    }
    if let Some(r) = external.resolve(t)? {
        if let Some(want) = want_bytes
            && r.length != want
        {
            return Err(invalid(format!(
                "declares {n} elements of {} ({want} bytes) but its external data holds {} bytes",
                tensor::dtype_name(t.data_type),
                r.length
            )));
        }
        return Ok(());
    }
    if !t.raw_data.is_empty() || dtype == D::Undefined {
        if let Some(want) = want_bytes
            && t.raw_data.len() as u64 != want
        {
            return Err(invalid(format!(
                "declares {n} elements of {} ({want} bytes) but holds {} bytes",
                tensor::dtype_name(t.data_type),
                t.raw_data.len()
            )));
        }
        return Ok(());
    }
    let held = match dtype {
        D::Float => t.float_data.len() as u64,
        D::Complex64 => t.float_data.len() as u64 / 2,
        D::Double => t.double_data.len() as u64,
        D::Complex128 => t.double_data.len() as u64 / 2,
        D::Int64 => t.int64_data.len() as u64,
        D::Uint32 | D::Uint64 => t.uint64_data.len() as u64,
        D::String => t.string_data.len() as u64,
        // Sub-byte types pack several values into each stored integer.
        D::Uint4 | D::Int4 | D::Float4e2m1 => return Ok(()),
        _ => t.int32_data.len() as u64,
    };
    if held != n {
        return Err(invalid(format!(
            "declares {n} elements of {} but holds {held}",
            tensor::dtype_name(t.data_type)
        )));
    }
    Ok(())
}

/// A location must be a plain relative path below the folder: no root, no
/// drive prefix, no `..`.
fn check_relative(location: &str) -> std::result::Result<&Path, &'static str> {
    if location.is_empty() {
        return Err("is empty");
    }
    let path = Path::new(location);
    for component in path.components() {
        match component {
            Component::Normal(_) | Component::CurDir => {}
            Component::ParentDir => return Err("contains '..'"),
            Component::RootDir | Component::Prefix(_) => return Err("is an absolute path"),
        }
    }
    // Windows-style absolute or parent paths, whatever platform reads them.
    if location.starts_with('\\')
        || location.contains(":\\")
        || location.split(['/', '\\']).any(|p| p == "..")
    {
        return Err("is not a plain relative path");
    }
    Ok(path)
}

fn parse_u64(s: &str) -> Option<u64> {
    s.trim().parse().ok()
}

fn bad(what: &str, message: &str) -> Error {
    Error::new(ErrorKind::ExternalData, format!("{what} {message}"))
}

/// An I/O error as a short lower-case phrase.
pub(crate) fn io_message(e: &std::io::Error) -> String {
    match e.kind() {
        std::io::ErrorKind::NotFound => "no such file".to_owned(),
        std::io::ErrorKind::PermissionDenied => "permission denied".to_owned(),
        _ => {
            let s = e.to_string();
            // Drop the "(os error N)" tail: it helps nobody.
            match s.find(" (os error") {
                Some(i) => s[..i].to_owned(),
                None => s,
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn relative_locations() {
        assert!(check_relative("weights.bin").is_ok());
        assert!(check_relative("sub/weights.bin").is_ok());
        assert!(check_relative("./weights.bin").is_ok());
        assert_eq!(check_relative("../x.bin"), Err("contains '..'"));
        assert_eq!(check_relative("a/../../x.bin"), Err("contains '..'"));
        assert_eq!(check_relative("/etc/passwd"), Err("is an absolute path"));
        assert_eq!(check_relative(""), Err("is empty"));
        assert!(check_relative("..\\x.bin").is_err());
        assert!(check_relative("C:\\x.bin").is_err());
    }

    #[test]
    fn decode_rejects_garbage() {
        assert_eq!(decode(Bytes::new()).unwrap_err().kind(), ErrorKind::Decode);
        assert_eq!(
            decode(Bytes::from_static(b"hello, this is text\n")).unwrap_err().kind(),
            ErrorKind::Decode
        );
        // A valid protobuf message that is not a model: no graph.
        let empty = ModelProto { ir_version: 8, ..Default::default() }.encode_to_vec();
        assert!(decode(Bytes::from(empty)).unwrap_err().message().contains("no graph"));
    }

    #[test]
    fn checksum_of_file_or_range() {
        use crate::proto::{GraphProto, StringStringEntryProto};
        use sha1::{Digest, Sha1};
        let dir = tempfile::tempdir().unwrap();
        let data: Vec<u8> = (0..1000u32).map(|i| (i % 251) as u8).collect();
        fs::write(dir.path().join("w.bin"), &data).unwrap();
        let external = ExternalData::new(dir.path()).unwrap();
        let model_with = |checksum: String| ModelProto {
            graph: Some(GraphProto {
                initializer: vec![TensorProto {
                    name: "w".into(),
                    dims: vec![4, 4, 3, 3],
                    data_type: 1,
                    data_location: DataLocation::External as i32,
                    external_data: [("location", "w.bin"), ("offset", "100"), ("length", "576")]
                        .into_iter()
                        .map(|(k, v)| (k.to_owned(), v.to_owned()))
                        .chain([("checksum".to_owned(), checksum)])
                        .map(|(key, value)| StringStringEntryProto { key, value })
                        .collect(),
                    ..Default::default()
                }],
                ..Default::default()
            }),
            ..Default::default()
        };
        let whole = hex(&Sha1::digest(&data));
        let range = hex(&Sha1::digest(&data[100..676]));
        assert!(verify_checksums(&model_with(whole), &external).is_ok());
        assert!(verify_checksums(&model_with(range), &external).is_ok());
        let other = hex(&Sha1::digest(&data[..576]));
        let e = verify_checksums(&model_with(other), &external).unwrap_err();
        assert!(e.message().contains("checksum mismatch"), "{}", e.message());
        assert_eq!(parse_sha1(&"Ab".repeat(20)), Some([0xab; 20]));
        assert_eq!(parse_sha1("ab"), None);
        assert_eq!(parse_sha1(&"é".repeat(20)), None);
    }
}
