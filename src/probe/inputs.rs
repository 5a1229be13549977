//! What to feed a model: seeded synthetic inputs built from the graph's
//! input declarations, or arrays from a `.npy`/`.npz` file.
//!
//! Values come from a ChaCha8 stream per input (`set_stream(input index)`),
//! drawn sample after sample, so the same seed gives the same values on every
//! platform and however the samples are split into passes.
//!
//! Half-precision inputs (float16, bfloat16) get the same float32 stream
//! rounded to their type (round to nearest, ties to even), so one seed gives
//! a float32 model and its half-precision conversion the same inputs up to
//! that rounding. Feeds: a `.npy`/`.npz` array of float16 (`<f2`) is read
//! as it is; float32 or float64 arrays are rounded to a half-precision input's
//! type, and a float16 array widens exactly for a float32 input. numpy has no
//! bfloat16 type: ml_dtypes saves its bfloat16 arrays as the anonymous
//! 2-byte record `<V2`, which says nothing of what the bytes are, so it is
//! refused; bfloat16 inputs are fed from float32 arrays.

use std::collections::BTreeMap;
use std::fs::File;
use std::io::Read;
use std::path::{Path, PathBuf};

use ndarray::ArrayD;
use ndarray_npy::ReadNpyExt;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;
use sha2::{Digest, Sha256};

use tract_onnx::prelude::tract_data::half::{bf16, f16};

use crate::error::{Error, ErrorKind, Result};
use crate::graph::{Dim, Graph, Source};
use crate::proto::tensor_proto::DataType;

/// The distribution of synthetic float inputs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Dist {
    /// Normal with mean 0 and standard deviation `scale`.
    Normal,
    /// Uniform on `[-scale, scale]`.
    Uniform,
}

/// How inputs are made.
#[derive(Debug, Clone)]
pub struct InputConfig {
    /// Number of samples to run.
    pub samples: usize,
    /// Most samples in one forward pass of a model with a symbolic batch
    /// (`None`: all at once); bounds memory on large models. The standard
    /// is one: passes of one sample run faster per sample (their tensors
    /// stay in cache) and spread over threads (DEVELOPERS.md, "Threads").
    pub max_pass: Option<usize>,
    /// Seed of the generator.
    pub seed: u64,
    /// Distribution of float inputs.
    pub dist: Dist,
    /// Scale of the distribution.
    pub scale: f32,
    /// Values of symbolic dimensions other than the batch, by name.
    pub dims: BTreeMap<String, u64>,
    /// Whole shapes of inputs, by input name (the batch axis included).
    pub shapes: BTreeMap<String, Vec<u64>>,
    /// Inputs filled with one constant value, by name.
    pub fills: BTreeMap<String, f64>,
    /// The sample (batch) axis of an input, by name, where the one shunt
    /// infers is wrong; `None` says the input has no sample axis (it is fed
    /// whole to every pass).
    pub batch_axes: BTreeMap<String, Option<usize>>,
    /// A `.npy` (single-input models) or `.npz` (entries named after inputs) file.
    pub feed: Option<PathBuf>,
    /// Most elements one input may hold in one pass; checked before anything
    /// is allocated (a file may declare an input of 10^12 elements).
    pub max_input_elements: u64,
}

/// The default of [`InputConfig::max_input_elements`]: 2^28 elements, 1 GiB
/// of `f32` for one input in one pass.
pub const MAX_INPUT_ELEMENTS: u64 = 1 << 28;

impl InputConfig {
    /// The documented defaults, the only place they are written (the
    /// command line's defaults read them): 8 samples of standard normal
    /// inputs with seed 0, one sample per pass, nothing overridden, the
    /// default size limit.
    pub const STANDARD: InputConfig = InputConfig {
        samples: 8,
        max_pass: Some(1),
        seed: 0,
        dist: Dist::Normal,
        scale: 1.0,
        dims: BTreeMap::new(),
        shapes: BTreeMap::new(),
        fills: BTreeMap::new(),
        batch_axes: BTreeMap::new(),
        feed: None,
        max_input_elements: MAX_INPUT_ELEMENTS,
    };

    /// [`InputConfig::STANDARD`] with `samples` samples.
    pub fn standard(samples: usize) -> InputConfig {
        InputConfig { samples, ..InputConfig::STANDARD }
    }
}

/// One graph input as the graph declares it.
#[derive(Debug, Clone)]
pub struct InputSpec {
    /// ONNX name.
    pub name: String,
    /// ONNX element type.
    pub dtype: i32,
    /// Declared shape (`None` when the rank is unknown).
    pub shape: Option<Vec<Dim>>,
    /// Rows of the embedding table this input indexes, if it feeds one.
    pub vocab: Option<u64>,
}

/// The graph inputs of `g` with what is known of them.
pub fn input_specs(g: &Graph) -> Vec<InputSpec> {
    g.inputs
        .iter()
        .map(|&v| {
            let value = g.value(v);
            let vocab = g.value(v).consumers.iter().find_map(|&(n, slot)| {
                let node = g.node(n);
                if node.op != "Gather" || slot != 1 {
                    return None;
                }
                let table = node.inputs.first().copied().flatten()?;
                if g.value(table).source != Source::Initializer {
                    return None;
                }
                let dims = g.constant_dims(table)?;
                dims.first().and_then(|&d| u64::try_from(d).ok())
            });
            InputSpec {
                name: value.name.clone(),
                dtype: value.fact.dtype,
                shape: value.fact.shape.clone(),
                vocab,
            }
        })
        .collect()
}

/// Values of one input for one pass.
#[derive(Debug, Clone, PartialEq)]
pub enum Values {
    /// 32-bit floats.
    F32(Vec<f32>),
    /// IEEE 754 half-precision floats.
    F16(Vec<f16>),
    /// bfloat16 values (tract has no such type: they are fed widened to float32).
    BF16(Vec<bf16>),
    /// 64-bit integers.
    I64(Vec<i64>),
    /// 32-bit integers.
    I32(Vec<i32>),
    /// Booleans.
    Bool(Vec<bool>),
}

/// How one input is fed.
#[derive(Debug, Clone)]
pub struct PlannedInput {
    /// ONNX name.
    pub name: String,
    /// ONNX element type.
    pub dtype: i32,
    /// Shape of one pass.
    pub pass_shape: Vec<u64>,
    /// The axis that holds the samples (`None`: the input is fed whole to
    /// every pass, as a scalar or a recurrent state without samples).
    pub batch_axis: Option<usize>,
    /// What values it gets, in words (`normal(0, 1)`, `token ids uniform in [0, 50)`).
    pub how: String,
    source: Fill,
}

#[derive(Debug, Clone, PartialEq)]
enum Fill {
    Random(Dist, f32),
    Tokens(u64),
    Constant(f64),
    Array(ArrayD<f64>),
}

impl PlannedInput {
    /// Whether `other` is fed the same values, each rounded to its own
    /// element type: the same source (distribution and scale, token range,
    /// constant or array) and, past the batch axis, the same shape; the
    /// element types agree, or both are float types (a float16 copy of a
    /// model gets the float32 stream rounded, to nearest even).
    pub fn same_values(&self, other: &PlannedInput) -> Result<(), Mismatch> {
        if self.dtype != other.dtype && !(is_float(self.dtype) && is_float(other.dtype)) {
            return Err(Mismatch::ElementType(self.dtype, other.dtype));
        }
        let tail = |f: &PlannedInput| -> Vec<u64> {
            let axis = f.batch_axis;
            let dims = f.pass_shape.iter().enumerate();
            dims.filter(|(k, _)| Some(*k) != axis).map(|(_, &d)| d).collect()
        };
        if self.batch_axis != other.batch_axis {
            return Err(Mismatch::SampleAxis(self.batch_axis, other.batch_axis));
        }
        if tail(self) != tail(other) {
            return Err(Mismatch::SampleShape(tail(self), tail(other)));
        }
        if self.source != other.source {
            return Err(Mismatch::Values(self.how.clone(), other.how.clone()));
        }
        Ok(())
    }
}

/// How two planned inputs differ (A's side first).
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Mismatch {
    /// Element types that are not both float types.
    ElementType(i32, i32),
    /// Sample (batch) axes.
    SampleAxis(Option<usize>, Option<usize>),
    /// Shapes past the batch axis.
    SampleShape(Vec<u64>, Vec<u64>),
    /// Value sources, described.
    Values(String, String),
}

impl std::fmt::Display for Mismatch {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        use crate::load::tensor::dtype_name;
        match self {
            Mismatch::ElementType(a, b) => {
                write!(f, "element type {} in A, {} in B", dtype_name(*a), dtype_name(*b))
            }
            Mismatch::SampleAxis(a, b) => write!(f, "sample axis {a:?} in A, {b:?} in B"),
            Mismatch::SampleShape(a, b) => write!(f, "sample shape {a:?} in A, {b:?} in B"),
            Mismatch::Values(a, b) => write!(f, "values '{a}' in A, '{b}' in B"),
        }
    }
}

/// The element type of a feed array, as its `.npy` header declares it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum NpyType {
    F16,
    F32,
    F64,
    I64,
    I32,
    Bool,
}

impl NpyType {
    fn name(self) -> &'static str {
        match self {
            NpyType::F16 => "float16",
            NpyType::F32 => "float32",
            NpyType::F64 => "float64",
            NpyType::I64 => "int64",
            NpyType::I32 => "int32",
            NpyType::Bool => "bool",
        }
    }
}

/// Everything about what is fed, pass by pass.
#[derive(Debug, Clone)]
pub struct InputPlan {
    /// Inputs in graph order.
    pub inputs: Vec<PlannedInput>,
    /// Samples per pass.
    pub pass_batch: usize,
    /// Number of passes.
    pub passes: usize,
    /// Samples in all (`pass_batch * passes`).
    pub samples: usize,
    /// The seed used.
    pub seed: u64,
    /// The feed file and its SHA-256 digest, when one was given.
    pub feed: Option<(PathBuf, String)>,
    /// What the plan had to guess and the user should check (a scalar
    /// integer fed 1), one sentence each.
    pub warnings: Vec<String>,
}

/// Decides shapes, batching and values of every input.
///
/// The sample (batch) axis of each input: the one the user names
/// (`batch_axes`); else the axis of the model's batch symbol, the symbolic
/// dimension shared by the most inputs (ties: the one at the lowest axis,
/// then the earliest input), wherever it sits; an input without that symbol
/// has no sample axis unless its first axis is unknown. A model without
/// symbolic dimensions has a fixed batch: the first axis of its first input,
/// and the first axis of every input that declares the same size there.
/// Scalars never have a sample axis. An explicit whole shape (`shapes`) is
/// fed as it is, never rewritten.
pub fn plan(specs: &[InputSpec], config: &InputConfig) -> Result<InputPlan> {
    if config.samples == 0 {
        return Err(usage("--batch must be at least 1"));
    }
    for name in config.shapes.keys().chain(config.fills.keys()).chain(config.batch_axes.keys()) {
        if !specs.iter().any(|s| &s.name == name) {
            let names: Vec<&str> = specs.iter().map(|s| s.name.as_str()).collect();
            return Err(usage(format!(
                "the model has no input named '{name}' (inputs: {})",
                names.join(", ")
            )));
        }
    }
    let (axes, batch_symbol) = batch_axes(specs, config)?;
    let mut arrays: BTreeMap<String, (ArrayD<f64>, NpyType)> = BTreeMap::new();
    let mut feed = None;
    if let Some(path) = &config.feed {
        arrays = read_feed(path, specs)?;
        feed = Some((path.clone(), sha256_of(path)?));
    }
    // Samples per pass fixed by the model, the user's value of the batch
    // symbol, or an explicit shape; checked to agree.
    let mut fixed: Option<(usize, String)> = None;
    let mut fix = |k: usize, why: String| -> Result<()> {
        match &fixed {
            Some((f, first)) if *f != k => {
                Err(usage(format!("{why} gives {k} samples per pass, but {first} gives {f}")))
            }
            Some(_) => Ok(()),
            None => {
                fixed = Some((k, why));
                Ok(())
            }
        }
    };
    if let Some(v) = batch_symbol.as_ref().and_then(|b| config.dims.get(b)) {
        fix(*v as usize, format!("--dim {}={v}", batch_symbol.as_deref().unwrap_or_default()))?;
    }
    for (s, axis) in specs.iter().zip(&axes) {
        let Some(axis) = *axis else { continue };
        if let Some(shape) = config.shapes.get(&s.name) {
            if let Some(&k) = shape.get(axis) {
                fix(k as usize, format!("--input {} (axis {axis})", s.name))?;
            }
        } else if let Some(Dim::Known(k)) = s.shape.as_ref().and_then(|d| d.get(axis)) {
            fix(*k as usize, format!("input '{}' (declared, axis {axis})", s.name))?;
        }
    }
    // Samples in the feed, along each input's sample axis.
    let mut fed_samples: Option<(usize, String)> = None;
    for (s, axis) in specs.iter().zip(&axes) {
        let (Some((a, _)), Some(axis)) = (arrays.get(&s.name), axis) else { continue };
        let Some(&n) = a.shape().get(*axis) else {
            return Err(usage(format!(
                "feed entry '{}' has {} axes, but the input's sample axis is {axis}",
                s.name,
                a.ndim()
            ))
            .at(config.feed.as_deref().unwrap_or(Path::new(""))));
        };
        match &fed_samples {
            Some((m, first)) if *m != n => {
                return Err(usage(format!(
                    "its arrays disagree on the number of samples: '{first}' has {m}, '{}' has {n} \
                     along its sample axis {axis}",
                    s.name
                ))
                .at(config.feed.as_deref().unwrap_or(Path::new(""))));
            }
            Some(_) => {}
            None => fed_samples = Some((n, s.name.clone())),
        }
    }
    let fed_batch = fed_samples.map(|(n, _)| n);
    let fixed_batch = fixed.map(|(k, _)| k);
    let samples = fed_batch.unwrap_or(config.samples);
    let pass_batch = match (fixed_batch, fed_batch) {
        (Some(k), _) if k > 0 => k,
        (_, Some(n)) => n,
        _ => samples,
    };
    let pass_batch = match (fixed_batch, config.max_pass) {
        (None, Some(m)) if m > 0 => pass_batch.min(m),
        _ => pass_batch,
    };
    if pass_batch == 0 {
        return Err(usage("an input declares a batch of 0"));
    }
    let passes = samples.div_ceil(pass_batch);
    let mut inputs = Vec::with_capacity(specs.len());
    let mut warnings = Vec::new();
    for (s, &batch_axis) in specs.iter().zip(&axes) {
        let (pass_shape, source, how) = if let Some((a, npy)) = arrays.remove(&s.name) {
            let mut shape: Vec<u64> = a.shape().iter().map(|&d| d as u64).collect();
            if let Some(d) = batch_axis.and_then(|k| shape.get_mut(k)) {
                *d = pass_batch as u64;
            }
            let mut how = format!(
                "from {}",
                config.feed.as_deref().map_or(String::new(), |p| p.display().to_string())
            );
            // Say what a half-precision input or array does to the values.
            let (file, input) = (npy.name(), crate::load::tensor::dtype_name(s.dtype));
            if file != input && (is_half(s.dtype) || npy == NpyType::F16) && is_float(s.dtype) {
                let verb = if is_half(s.dtype) { "rounded to" } else { "widened to" };
                how.push_str(&format!(" ({file} {verb} {input})"));
            }
            (shape, Fill::Array(a), how)
        } else {
            let shape = resolve_shape(s, batch_axis, batch_symbol.as_deref(), pass_batch, config)?;
            let (source, how) = match config.fills.get(&s.name) {
                Some(&v) => (Fill::Constant(v), format!("constant {v}")),
                None if is_float(s.dtype) => {
                    let mut how = match config.dist {
                        Dist::Normal => format!("normal(0, {})", config.scale),
                        Dist::Uniform => format!("uniform(-{0}, {0})", config.scale),
                    };
                    if is_half(s.dtype) {
                        how.push_str(&format!(
                            " rounded to {}",
                            crate::load::tensor::dtype_name(s.dtype)
                        ));
                    }
                    (Fill::Random(config.dist, config.scale), how)
                }
                None => match s.vocab {
                    Some(v) if v > 0 => (Fill::Tokens(v), format!("token ids uniform in [0, {v})")),
                    _ if shape.iter().product::<u64>() == 1 && batch_axis.is_none() => {
                        warnings.push(format!(
                            "input '{0}' is a single integer that indexes no table (a sample rate, \
                             a length, a step?): it is fed 1, which may not be a value the model \
                             expects; give its value with --fill {0}=VALUE",
                            s.name
                        ));
                        (Fill::Constant(1.0), "1 (a guess: set it with --fill)".to_owned())
                    }
                    _ => (Fill::Constant(1.0), "ones (mask-like)".to_owned()),
                },
            };
            (shape, source, how)
        };
        let elements = pass_shape.iter().try_fold(1u64, |acc, &d| acc.checked_mul(d));
        if elements.is_none_or(|n| n > config.max_input_elements) {
            let shape: Vec<String> = pass_shape.iter().map(u64::to_string).collect();
            return Err(usage(format!(
                "input '{}' would hold {} elements in one pass (shape {}), more than the limit of {}; \
                 lower --pass-batch, give a smaller shape with --input, or raise --max-input-elements",
                s.name,
                elements.map_or_else(|| "more than 2^64".to_owned(), |n| n.to_string()),
                shape.join("x"),
                config.max_input_elements
            )));
        }
        inputs.push(PlannedInput {
            name: s.name.clone(),
            dtype: s.dtype,
            pass_shape,
            batch_axis,
            how,
            source,
        });
    }
    Ok(InputPlan {
        inputs,
        pass_batch,
        passes,
        samples: pass_batch * passes,
        seed: config.seed,
        feed,
        warnings,
    })
}

/// The sample axis of every input (see [`plan`]) and the batch symbol.
fn batch_axes(
    specs: &[InputSpec],
    config: &InputConfig,
) -> Result<(Vec<Option<usize>>, Option<String>)> {
    // Symbols: how many inputs hold each, and the first (axis, input) where.
    let mut symbols: Vec<(String, usize, (usize, usize))> = Vec::new();
    for (i, s) in specs.iter().enumerate() {
        let mut seen: Vec<&str> = Vec::new();
        for (axis, d) in s.shape.iter().flatten().enumerate() {
            let Dim::Symbol(sym) = d else { continue };
            if seen.contains(&sym.as_str()) {
                continue;
            }
            seen.push(sym);
            match symbols.iter_mut().find(|e| &e.0 == sym) {
                Some(e) => {
                    e.1 += 1;
                    e.2 = e.2.min((axis, i));
                }
                None => symbols.push((sym.clone(), 1, (axis, i))),
            }
        }
    }
    let batch =
        symbols.iter().max_by(|a, b| a.1.cmp(&b.1).then(b.2.cmp(&a.2))).map(|e| e.0.clone());
    let first_fixed = specs.first().and_then(|s| match s.shape.as_ref()?.first()? {
        Dim::Known(k) => Some(*k),
        _ => None,
    });
    let mut axes = Vec::with_capacity(specs.len());
    for s in specs {
        if let Some(&chosen) = config.batch_axes.get(&s.name) {
            let rank = config.shapes.get(&s.name).map(Vec::len).or(s.shape.as_ref().map(Vec::len));
            if let (Some(axis), Some(rank)) = (chosen, rank)
                && axis >= rank
            {
                return Err(usage(format!(
                    "--batch-axis {}={axis}: the input has {rank} axes",
                    s.name
                )));
            }
            axes.push(chosen);
            continue;
        }
        let axis = match &s.shape {
            // Unknown rank: the shape comes from --input; the first axis, as before.
            None => Some(0),
            Some(dims) if dims.is_empty() => None,
            Some(dims) => match &batch {
                Some(b) => dims
                    .iter()
                    .position(|d| matches!(d, Dim::Symbol(x) if x == b))
                    .or((dims[0] == Dim::Unknown).then_some(0)),
                None => match &dims[0] {
                    Dim::Unknown => Some(0),
                    Dim::Known(k) if Some(*k) == first_fixed => Some(0),
                    _ => None,
                },
            },
        };
        axes.push(axis);
    }
    Ok((axes, batch))
}

fn resolve_shape(
    s: &InputSpec,
    batch_axis: Option<usize>,
    batch_symbol: Option<&str>,
    pass_batch: usize,
    config: &InputConfig,
) -> Result<Vec<u64>> {
    if let Some(shape) = config.shapes.get(&s.name) {
        // A whole shape the user gave is what is fed.
        return Ok(shape.clone());
    }
    let Some(declared) = &s.shape else {
        return Err(usage(format!(
            "input '{}' declares no shape; give one with --input {}=D1xD2x...",
            s.name, s.name
        )));
    };
    declared
        .iter()
        .enumerate()
        .map(|(axis, d)| match d {
            _ if Some(axis) == batch_axis => Ok(pass_batch as u64),
            Dim::Known(k) => Ok(*k),
            // The batch symbol anywhere is the samples per pass.
            Dim::Symbol(sym) if Some(sym.as_str()) == batch_symbol => Ok(pass_batch as u64),
            Dim::Symbol(sym) => match config.dims.get(sym) {
                Some(&v) => Ok(v),
                None => Err(usage(format!(
                    "input '{}' has symbolic dimension '{sym}' at axis {axis}; set it with --dim {sym}=VALUE",
                    s.name
                ))),
            },
            Dim::Unknown => Err(usage(format!(
                "input '{}' has an unknown dimension at axis {axis}; give the shape with --input {}=D1xD2x...",
                s.name, s.name
            ))),
        })
        .collect()
}

/// The values of every input for pass `pass` (0-based).
///
/// An input with a sample axis gets samples `pass * pass_batch ..` along
/// it (a feed's last pass past its end repeats its first samples; random
/// values are drawn sample after sample, so splitting the samples into
/// passes never changes them, wherever the sample axis sits). An input
/// without one gets the same values in every pass.
pub fn values(input_plan: &InputPlan, pass: usize) -> Vec<Values> {
    input_plan
        .inputs
        .iter()
        .enumerate()
        .map(|(index, fed)| {
            let n: u64 = fed.pass_shape.iter().product();
            let n = n as usize;
            let batch = fed.batch_axis.map_or(1, |_| input_plan.pass_batch);
            let first = fed.batch_axis.map_or(0, |_| pass * input_plan.pass_batch);
            let as_f64: Vec<f64> = match &fed.source {
                Fill::Constant(v) => vec![*v; n],
                Fill::Array(a) => match fed.batch_axis {
                    None => a.iter().copied().collect(),
                    Some(axis) => {
                        let total = a.shape()[axis].max(1);
                        let picks: Vec<usize> = (first..first + batch).map(|i| i % total).collect();
                        a.select(ndarray::Axis(axis), &picks).iter().copied().collect()
                    }
                },
                Fill::Random(..) | Fill::Tokens(_) => {
                    let mut rng = ChaCha8Rng::seed_from_u64(input_plan.seed);
                    rng.set_stream(index as u64);
                    let per_sample = n.checked_div(batch).unwrap_or(n);
                    // Skip the samples of earlier passes, draw this pass's.
                    let mut out = Vec::with_capacity(n);
                    for i in 0..(first * per_sample + n) {
                        let v = match &fed.source {
                            Fill::Random(Dist::Normal, s) => {
                                let z: f32 = rng.sample(StandardNormal);
                                (z * s) as f64
                            }
                            Fill::Random(Dist::Uniform, s) => {
                                rng.random_range(-1.0f32..=1.0) as f64 * *s as f64
                            }
                            Fill::Tokens(v) => rng.random_range(0..*v) as f64,
                            _ => unreachable!("only random fills are drawn"),
                        };
                        if i >= first * per_sample {
                            out.push(v);
                        }
                    }
                    sample_major_to_layout(out, &fed.pass_shape, fed.batch_axis)
                }
            };
            match DataType::try_from(fed.dtype) {
                Ok(DataType::Int64) => Values::I64(as_f64.iter().map(|&v| v as i64).collect()),
                Ok(DataType::Int32) => Values::I32(as_f64.iter().map(|&v| v as i32).collect()),
                Ok(DataType::Bool) => Values::Bool(as_f64.iter().map(|&v| v != 0.0).collect()),
                // Generated values are float32 already, so rounding from f64
                // is rounding the float32 stream (one rounding, to nearest even).
                Ok(DataType::Float16) => {
                    Values::F16(as_f64.iter().map(|&v| f16::from_f64(v)).collect())
                }
                Ok(DataType::Bfloat16) => {
                    Values::BF16(as_f64.iter().map(|&v| bf16::from_f32(v as f32)).collect())
                }
                _ => Values::F32(as_f64.iter().map(|&v| v as f32).collect()),
            }
        })
        .collect()
}

/// Values drawn sample after sample (the sample axis outermost) laid out
/// in `shape`, whose sample axis is `axis`: unchanged when it is the first.
fn sample_major_to_layout(values: Vec<f64>, shape: &[u64], axis: Option<usize>) -> Vec<f64> {
    let Some(axis) = axis.filter(|&a| a > 0 && a < shape.len()) else { return values };
    let mut drawn: Vec<usize> = shape.iter().map(|&d| d as usize).collect();
    let samples = drawn.remove(axis);
    drawn.insert(0, samples);
    let Ok(a) = ArrayD::from_shape_vec(ndarray::IxDyn(&drawn), values.clone()) else {
        return values;
    };
    // Axis 0 of the drawn array goes back to `axis`.
    let mut order: Vec<usize> = (1..shape.len()).collect();
    order.insert(axis, 0);
    a.permuted_axes(ndarray::IxDyn(&order)).iter().copied().collect()
}

/// Stream numbers of perturbation directions start here, far above the
/// streams of the inputs themselves (one per input index).
const DIRECTION_STREAMS: u64 = 1 << 32;

/// The perturbed copy of `values` (one pass of every input) for the
/// perturbation gain: each float input becomes `x + step * d`, where `d` is a
/// seeded standard normal direction rescaled per sample so that RMS(d) equals
/// RMS(x) of that sample (or 1 when the sample is all zeros). So `step` is
/// the size of the change relative to the input. Non-float inputs are kept.
/// Directions come from ChaCha8 streams of their own, drawn sample after
/// sample like the inputs, so they do not depend on how samples are split
/// into passes. Inputs whose samples are not along their first axis are
/// kept, and so are half-precision inputs: the step (1e-3 by
/// default) is about two units in the last place of float16 (2^-11 relative
/// per rounding) and below one of bfloat16 (2^-8), so the change would be
/// mostly rounding.
pub fn perturbed(input_plan: &InputPlan, pass: usize, values: &[Values], step: f32) -> Vec<Values> {
    values
        .iter()
        .enumerate()
        .map(|(index, v)| {
            let Values::F32(x) = v else { return v.clone() };
            // Inputs without samples along their first axis (a recurrent
            // state, a scalar) are kept: a per-sample step needs the samples.
            if input_plan.inputs.get(index).is_some_and(|f| f.batch_axis != Some(0)) {
                return v.clone();
            }
            let n = x.len();
            let per_sample = n.checked_div(input_plan.pass_batch).filter(|&p| p > 0).unwrap_or(n);
            let mut rng = ChaCha8Rng::seed_from_u64(input_plan.seed);
            rng.set_stream(DIRECTION_STREAMS + index as u64);
            let skip = pass * per_sample * input_plan.pass_batch;
            for _ in 0..skip {
                let _: f32 = rng.sample(StandardNormal);
            }
            let d: Vec<f32> = (0..n).map(|_| rng.sample(StandardNormal)).collect();
            let mut out = Vec::with_capacity(n);
            for (xs, ds) in x.chunks(per_sample.max(1)).zip(d.chunks(per_sample.max(1))) {
                let rx = crate::stats::rms(xs);
                let rd = crate::stats::rms(ds);
                let scale = if rd > 0.0 { (if rx > 0.0 { rx } else { 1.0 }) / rd } else { 0.0 };
                let k = step as f64 * scale;
                out.extend(xs.iter().zip(ds).map(|(&a, &b)| (a as f64 + k * b as f64) as f32));
            }
            Values::F32(out)
        })
        .collect()
}

fn is_half(dtype: i32) -> bool {
    matches!(DataType::try_from(dtype), Ok(DataType::Float16 | DataType::Bfloat16))
}

fn is_float(dtype: i32) -> bool {
    matches!(
        DataType::try_from(dtype),
        Ok(DataType::Float | DataType::Double | DataType::Float16 | DataType::Bfloat16) | Err(_)
    ) || dtype == 0
}

fn read_feed(path: &Path, specs: &[InputSpec]) -> Result<Arrays> {
    let bad = |m: String| Error::new(ErrorKind::Usage, m).at(path);
    let is_npz = path.extension().is_some_and(|e| e.eq_ignore_ascii_case("npz"));
    let names: Vec<&str> = specs.iter().map(|s| s.name.as_str()).collect();
    if is_npz {
        let file = File::open(path).map_err(|e| bad(crate::load::io_message(&e)))?;
        read_npz(file, &names).map_err(bad)
    } else {
        let bytes = std::fs::read(path).map_err(|e| bad(crate::load::io_message(&e)))?;
        read_npy(&bytes, &names).map_err(bad)
    }
}

/// The arrays of a feed held in memory: the bytes of a `.npz` (`npz: true`,
/// one entry per name in `names`) or of a `.npy` (one name). The error is the
/// problem without the file name. The fuzz target `npy_feed` calls this.
pub fn read_feed_bytes(
    bytes: &[u8],
    npz: bool,
    names: &[&str],
) -> std::result::Result<BTreeMap<String, ArrayD<f64>>, String> {
    let arrays =
        if npz { read_npz(std::io::Cursor::new(bytes), names) } else { read_npy(bytes, names) }?;
    Ok(arrays.into_iter().map(|(k, (a, _))| (k, a)).collect())
}

/// Feed arrays by input name, with the element type each file declared.
type Arrays = BTreeMap<String, (ArrayD<f64>, NpyType)>;

/// Largest `.npz` entry decompressed, in bytes (a small archive may inflate
/// to far more than it holds).
const MAX_NPZ_ENTRY: u64 = 4 << 30;

fn read_npz<R: std::io::Read + std::io::Seek>(
    reader: R,
    names: &[&str],
) -> std::result::Result<Arrays, String> {
    let mut zip =
        zip::ZipArchive::new(reader).map_err(|e| format!("not a readable .npz file ({e})"))?;
    let entries: Vec<String> = zip.file_names().map(str::to_owned).collect();
    let mut out = BTreeMap::new();
    for &name in names {
        let entry =
            entries.iter().find(|n| n.as_str() == name || n.strip_suffix(".npy") == Some(name));
        let Some(entry) = entry else {
            return Err(format!(
                "has no entry for input '{name}' (entries: {})",
                entries.join(", ")
            ));
        };
        let in_entry = |m: String| format!("entry '{entry}': {m}");
        let mut bytes = Vec::new();
        zip.by_name(entry)
            .map_err(|e| in_entry(format!("cannot be read ({e})")))?
            .take(MAX_NPZ_ENTRY + 1)
            .read_to_end(&mut bytes)
            .map_err(|e| in_entry(format!("cannot be read ({e})")))?;
        if bytes.len() as u64 > MAX_NPZ_ENTRY {
            return Err(in_entry(format!("inflates to more than {MAX_NPZ_ENTRY} bytes")));
        }
        let array = read_npy_any(&bytes).map_err(in_entry)?;
        out.insert(name.to_owned(), array);
    }
    Ok(out)
}

fn read_npy(bytes: &[u8], names: &[&str]) -> std::result::Result<Arrays, String> {
    if names.len() != 1 {
        return Err(format!(
            "a .npy file feeds a model with one input; this one has {} (use a .npz with one entry per input)",
            names.len()
        ));
    }
    let array = read_npy_any(bytes)?;
    Ok(BTreeMap::from([(names[0].to_owned(), array)]))
}

/// Largest `.npy` header read, in bytes: numpy's own loader refuses headers
/// over 10,000 bytes by default (`max_header_size` of `numpy.load`, added
/// because parsing a large literal is slow) and so does this one.
const MAX_NPY_HEADER: usize = 10_000;

/// Checks a `.npy` header before the array reader parses it: the magic, a
/// known version, a header length within the bytes and [`MAX_NPY_HEADER`],
/// and a flat dictionary. The reader's literal parser takes time exponential
/// in the nesting of brackets (fuzzing found a 138-byte header of four nested
/// dictionaries that took seconds), and a feed header never nests: it is
/// `{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), }`.
fn check_npy_header(bytes: &[u8]) -> std::result::Result<Header<'_>, String> {
    let bad = |m: &str| Err(format!("not a readable .npy array ({m})"));
    let Some(rest) = bytes.strip_prefix(b"\x93NUMPY") else {
        return bad("no .npy magic string");
    };
    let (len, start) = match rest {
        [1, _, a, b, ..] => (usize::from(u16::from_le_bytes([*a, *b])), 10),
        [2 | 3, _, a, b, c, d, ..] => (u32::from_le_bytes([*a, *b, *c, *d]) as usize, 12),
        [1..=3, ..] | [] => return bad("truncated header"),
        [v, ..] => return bad(&format!("unknown format version {v}")),
    };
    if len > MAX_NPY_HEADER {
        return bad(&format!("a header of {len} bytes, more than {MAX_NPY_HEADER}"));
    }
    let Some(header) = bytes.get(start..start + len) else {
        return bad("truncated header");
    };
    let count = |c: u8| header.iter().filter(|&&b| b == c).count();
    if count(b'{') != 1 || count(b'}') != 1 || count(b'[') + count(b']') > 0 || count(b'(') > 1 {
        return bad("the header is not a flat dictionary of descr, fortran_order and shape");
    }
    let Ok(text) = std::str::from_utf8(header) else {
        return bad("the header is not text");
    };
    Ok(Header { text, data: start + len })
}

fn read_npy_any(bytes: &[u8]) -> std::result::Result<(ArrayD<f64>, NpyType), String> {
    let header = check_npy_header(bytes)?;
    // ndarray-npy reads no float16: the two half-precision layouts numpy
    // writes are read here, and ml_dtypes' bfloat16 (`<V2`) is refused.
    match descr(header) {
        Some("<f2" | ">f2") => return read_f16(bytes, header).map(|a| (a, NpyType::F16)),
        Some("<V2" | "|V2") => {
            return Err("not a readable .npy array: its element type is '<V2', the anonymous \
                        2-byte record that ml_dtypes' bfloat16 is saved as (and any other \
                        2-byte record too); save bfloat16 feeds as float32 (np.float32), which \
                        shunt rounds to bfloat16 for a bfloat16 input"
                .to_owned());
        }
        _ => {}
    }
    if let Ok(a) = ArrayD::<f32>::read_npy(bytes) {
        return Ok((a.mapv(|v| v as f64), NpyType::F32));
    }
    if let Ok(a) = ArrayD::<f64>::read_npy(bytes) {
        return Ok((a, NpyType::F64));
    }
    if let Ok(a) = ArrayD::<i64>::read_npy(bytes) {
        return Ok((a.mapv(|v| v as f64), NpyType::I64));
    }
    if let Ok(a) = ArrayD::<i32>::read_npy(bytes) {
        return Ok((a.mapv(|v| v as f64), NpyType::I32));
    }
    match ArrayD::<bool>::read_npy(bytes) {
        Ok(a) => Ok((a.mapv(|v| if v { 1.0 } else { 0.0 }), NpyType::Bool)),
        Err(e) => Err(format!(
            "not a readable .npy array of float16, float32, float64, int64, int32 or bool ({e})"
        )),
    }
}

/// Where a checked `.npy` header is: its text and the offset of the data.
#[derive(Clone, Copy)]
struct Header<'a> {
    text: &'a str,
    data: usize,
}

/// The value of `key` in a flat `.npy` header dictionary: the text after
/// `'key':` up to the next top-level comma (a tuple counts as one value).
fn header_value<'a>(header: Header<'a>, key: &str) -> Option<&'a str> {
    let at = header.text.find(&format!("'{key}'"))?;
    let rest = header.text[at + key.len() + 2..].trim_start().strip_prefix(':')?.trim_start();
    let end = if rest.starts_with('(') {
        rest.find(')')? + 1
    } else {
        rest.find([',', '}']).unwrap_or(rest.len())
    };
    Some(rest[..end].trim())
}

/// The element type a header declares (`<f4`, `<f2`…), without its quotes.
fn descr(header: Header<'_>) -> Option<&str> {
    let v = header_value(header, "descr")?;
    v.strip_prefix('\'').and_then(|v| v.strip_suffix('\''))
}

/// A float16 `.npy` array (either byte order, C or Fortran layout), widened
/// to f64 exactly.
fn read_f16(bytes: &[u8], header: Header<'_>) -> std::result::Result<ArrayD<f64>, String> {
    let bad = |m: &str| format!("not a readable .npy array of float16 ({m})");
    let fortran = match header_value(header, "fortran_order") {
        Some("False") => false,
        Some("True") => true,
        _ => return Err(bad("no fortran_order of True or False")),
    };
    let shape = header_value(header, "shape")
        .and_then(|v| v.strip_prefix('(')?.strip_suffix(')'))
        .ok_or_else(|| bad("no shape tuple"))?;
    let shape: Vec<usize> = shape
        .split(',')
        .map(str::trim)
        .filter(|d| !d.is_empty())
        .map(|d| d.parse::<usize>().map_err(|_| bad(&format!("a dimension '{d}'"))))
        .collect::<std::result::Result<_, _>>()?;
    let n = shape.iter().try_fold(1usize, |acc, &d| acc.checked_mul(d));
    let data = &bytes[header.data..];
    if n.and_then(|n| n.checked_mul(2)) != Some(data.len()) {
        return Err(bad(&format!(
            "{} bytes of data for shape {shape:?}, which needs {}",
            data.len(),
            n.map_or_else(|| "more than 2^64 elements".to_owned(), |n| format!("{}", n * 2))
        )));
    }
    let big = descr(header) == Some(">f2");
    let values: Vec<f64> = data
        .chunks_exact(2)
        .map(|b| {
            let bits = if big { [b[1], b[0]] } else { [b[0], b[1]] };
            f16::from_le_bytes(bits).to_f64()
        })
        .collect();
    use ndarray::ShapeBuilder;
    let dim = ndarray::IxDyn(&shape);
    let a = if fortran {
        ArrayD::from_shape_vec(dim.f(), values)
    } else {
        ArrayD::from_shape_vec(dim, values)
    };
    a.map_err(|e| bad(&e.to_string()))
}

fn sha256_of(path: &Path) -> Result<String> {
    let mut file = File::open(path)
        .map_err(|e| Error::new(ErrorKind::Usage, crate::load::io_message(&e)).at(path))?;
    let mut hasher = Sha256::new();
    let mut buf = vec![0u8; 1 << 16];
    loop {
        let n = file
            .read(&mut buf)
            .map_err(|e| Error::new(ErrorKind::Io, crate::load::io_message(&e)).at(path))?;
        if n == 0 {
            break;
        }
        hasher.update(&buf[..n]);
    }
    Ok(hasher.finalize().iter().map(|b| format!("{b:02x}")).collect())
}

fn usage(message: impl Into<String>) -> Error {
    Error::new(ErrorKind::Usage, message)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn spec(name: &str, dims: Vec<Dim>) -> InputSpec {
        InputSpec {
            name: name.into(),
            dtype: DataType::Float as i32,
            shape: Some(dims),
            vocab: None,
        }
    }

    /// All samples in one pass of a symbolic batch, unless a test says.
    fn config(samples: usize) -> InputConfig {
        InputConfig { seed: 7, max_pass: None, ..InputConfig::standard(samples) }
    }

    #[test]
    fn same_seed_same_values_whatever_the_passes() {
        let sym = spec("x", vec![Dim::Symbol("N".into()), Dim::Known(3)]);
        let one = plan(std::slice::from_ref(&sym), &config(4)).unwrap();
        assert_eq!((one.pass_batch, one.passes), (4, 1));
        let all = match &values(&one, 0)[0] {
            Values::F32(v) => v.clone(),
            other => panic!("{other:?}"),
        };
        assert_eq!(all.len(), 12);
        // A fixed batch of 2 runs the same samples as two passes.
        let fixed = spec("x", vec![Dim::Known(2), Dim::Known(3)]);
        let two = plan(&[fixed], &config(4)).unwrap();
        assert_eq!((two.pass_batch, two.passes), (2, 2));
        let mut joined = Vec::new();
        for p in 0..2 {
            match &values(&two, p)[0] {
                Values::F32(v) => joined.extend_from_slice(v),
                other => panic!("{other:?}"),
            }
        }
        assert_eq!(joined, all);
    }

    #[test]
    fn symbolic_dims_need_values() {
        let s = spec("x", vec![Dim::Symbol("N".into()), Dim::Symbol("seq".into())]);
        let e = plan(std::slice::from_ref(&s), &config(2)).unwrap_err();
        assert!(e.message().contains("--dim seq=VALUE"), "{e}");
        let mut c = config(2);
        c.dims.insert("seq".into(), 5);
        assert_eq!(plan(&[s], &c).unwrap().inputs[0].pass_shape, vec![2, 5]);
    }

    /// Issue 15, item 2: `input [batch, samples]`, `state [2, batch, 128]`
    /// and a scalar `sr`.
    fn streaming_specs() -> Vec<InputSpec> {
        let batch = || Dim::Symbol("batch".into());
        vec![
            spec("input", vec![batch(), Dim::Symbol("samples".into())]),
            spec("state", vec![Dim::Known(2), batch(), Dim::Known(128)]),
            InputSpec {
                name: "sr".into(),
                dtype: DataType::Int64 as i32,
                shape: Some(vec![]),
                vocab: None,
            },
        ]
    }

    #[test]
    fn the_batch_axis_is_found_per_input() {
        let mut c = config(3);
        c.dims.insert("samples".into(), 16);
        let f = plan(&streaming_specs(), &c).unwrap();
        let axes: Vec<Option<usize>> = f.inputs.iter().map(|i| i.batch_axis).collect();
        assert_eq!(axes, [Some(0), Some(1), None]);
        let shapes: Vec<&[u64]> = f.inputs.iter().map(|i| i.pass_shape.as_slice()).collect();
        assert_eq!(shapes, [&[3, 16][..], &[2, 3, 128], &[]]);
        assert_eq!(f.warnings.len(), 1, "{:?}", f.warnings);
        assert!(f.warnings[0].contains("--fill sr=VALUE"), "{}", f.warnings[0]);
        // The batch symbol's value fixes the samples per pass.
        c.dims.insert("batch".into(), 1);
        let f = plan(&streaming_specs(), &c).unwrap();
        assert_eq!((f.pass_batch, f.passes), (1, 3));
        assert_eq!(f.inputs[1].pass_shape, [2, 1, 128]);
        // A whole shape is fed as given, and fixes the samples per pass.
        let mut c = config(2);
        c.shapes.insert("state".into(), vec![2, 1, 128]);
        c.shapes.insert("input".into(), vec![1, 16]);
        let f = plan(&streaming_specs(), &c).unwrap();
        assert_eq!(f.inputs[1].pass_shape, [2, 1, 128]);
        assert_eq!(f.inputs[0].pass_shape, [1, 16]);
        assert_eq!((f.pass_batch, f.passes), (1, 2));
        // Two whole shapes that disagree on the samples per pass are refused.
        c.shapes.insert("input".into(), vec![4, 16]);
        let e = plan(&streaming_specs(), &c).unwrap_err();
        assert!(e.message().contains("samples per pass"), "{e}");
        // The user names an axis shunt cannot infer.
        let mut c = config(2);
        c.dims.insert("samples".into(), 16);
        c.batch_axes.insert("state".into(), None);
        let f = plan(&streaming_specs(), &c).unwrap();
        assert_eq!(
            (f.inputs[1].batch_axis, f.inputs[1].pass_shape.as_slice()),
            (None, &[2, 2, 128][..])
        );
    }

    #[test]
    fn samples_along_a_later_axis_do_not_depend_on_the_passes() {
        let mut c = config(4);
        c.dims.insert("samples".into(), 3);
        let whole = plan(&streaming_specs(), &c).unwrap();
        let Values::F32(all) = &values(&whole, 0)[1] else { panic!() };
        let all = ArrayD::from_shape_vec(ndarray::IxDyn(&[2, 4, 128]), all.clone()).unwrap();
        c.max_pass = Some(2);
        let split = plan(&streaming_specs(), &c).unwrap();
        assert_eq!((split.pass_batch, split.passes), (2, 2));
        for p in 0..2 {
            let Values::F32(part) = &values(&split, p)[1] else { panic!() };
            let part = ArrayD::from_shape_vec(ndarray::IxDyn(&[2, 2, 128]), part.clone()).unwrap();
            let want = all.slice_axis(ndarray::Axis(1), (2 * p..2 * p + 2).into());
            assert_eq!(part.view(), want);
        }
        // The sample-less scalar is the same in every pass.
        assert_eq!(values(&split, 0)[2], values(&split, 1)[2]);
    }

    #[test]
    fn tokens_and_masks() {
        let ids = InputSpec {
            name: "ids".into(),
            dtype: DataType::Int64 as i32,
            shape: Some(vec![Dim::Symbol("N".into()), Dim::Known(8)]),
            vocab: Some(50),
        };
        let mask = InputSpec {
            name: "mask".into(),
            dtype: DataType::Int64 as i32,
            shape: Some(vec![Dim::Symbol("N".into()), Dim::Known(8)]),
            vocab: None,
        };
        let f = plan(&[ids, mask], &config(3)).unwrap();
        let v = values(&f, 0);
        let Values::I64(ids) = &v[0] else { panic!() };
        assert!(ids.iter().all(|&t| (0..50).contains(&t)));
        assert!(ids.iter().any(|&t| t != ids[0]));
        assert_eq!(v[1], Values::I64(vec![1; 24]));
        assert!(f.inputs[1].how.contains("mask"));
    }

    #[test]
    fn npy_headers_are_checked_before_parsing() {
        // Regression: found by the npy_feed fuzz target, a 138-byte header of
        // nested dictionaries that the literal parser took seconds over.
        // (Also in fuzz/corpus/npy_feed/r7-nested-header.)
        let nested: &[u8] = b"\x93NUMPY\x01\x00v\x00{{{{'decr':{'decr': '<i8',{{ 'rcr': '<i8',{{ '<i8',[{'\x07ecr': 1\x0d\x0a8', 'fortran_order': F1\x0d\x0a8', 'fortran_order': Fa  (  \x0a\x01\x00\x00\x00\x00\x00\x00\x00o?";
        let e = read_feed_bytes(nested, false, &["x"]).unwrap_err();
        assert!(e.contains("not a flat dictionary"), "{e}");
        // A well-formed header (as numpy writes it) still reads.
        let header = b"{'descr': '<f4', 'fortran_order': False, 'shape': (2,), }";
        let mut npy = b"\x93NUMPY\x01\x00".to_vec();
        let padded = header.len() + 1 + (64 - (10 + header.len() + 1) % 64) % 64;
        npy.extend_from_slice(&(padded as u16).to_le_bytes());
        npy.extend_from_slice(header);
        npy.resize(10 + padded - 1, b' ');
        npy.push(b'\n');
        npy.extend_from_slice(&[0, 0, 128, 63, 0, 0, 0, 64]);
        let ok = read_feed_bytes(&npy, false, &["x"]).unwrap();
        assert_eq!(ok["x"].as_slice().unwrap(), &[1.0, 2.0]);
        // A header longer than numpy's own default limit.
        let mut long = b"\x93NUMPY\x02\x00".to_vec();
        long.extend_from_slice(&20_000u32.to_le_bytes());
        long.resize(12 + 20_000, b' ');
        let e = read_feed_bytes(&long, false, &["x"]).unwrap_err();
        assert!(e.contains("more than 10000"), "{e}");
        for short in [&b"\x93NUMPY"[..], b"\x93NUMPY\x01", b"\x93NUMPY\x09\x00"] {
            assert!(read_feed_bytes(short, false, &["x"]).is_err());
        }
    }
}
