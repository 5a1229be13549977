//! A small builder that writes ONNX graphs with our prost types.
//!
//! The builder keeps the shape of every tensor it creates, so helpers can
//! read input channel counts (a convolution needs them for its weights) and
//! so a finished model can carry a `value_info` entry for each intermediate
//! tensor. Weights come from a seeded generator keyed by the initializer
//! name: the same calls give byte-identical models, and adding a node in one
//! place does not change the weights drawn elsewhere.

use std::collections::HashMap;

use bytes::Bytes;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};

use shunt::proto::attribute_proto::AttributeType;
use shunt::proto::tensor_proto::{DataLocation, DataType};
use shunt::proto::tensor_shape_proto::{Dimension, dimension};
use shunt::proto::{
    AttributeProto, GraphProto, ModelProto, NodeProto, OperatorSetIdProto, StringStringEntryProto,
    TensorProto, TensorShapeProto, TypeProto, ValueInfoProto, type_proto,
};

/// The IR version every built model declares.
pub const IR_VERSION: i64 = 8;
/// The producer name every built model declares.
pub const PRODUCER: &str = "shunt-testkit";

/// One dimension of a tensor shape: a known size or a named symbol.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub enum Dim {
    /// A known size.
    Fixed(i64),
    /// A size known only by name, such as the batch `"N"`.
    Sym(String),
}

impl Dim {
    /// The symbolic batch dimension `"N"`.
    pub fn batch() -> Dim {
        Dim::Sym("N".to_owned())
    }

    /// The size, when it is known.
    pub fn fixed(&self) -> Option<i64> {
        match self {
            Dim::Fixed(size) => Some(*size),
            Dim::Sym(_) => None,
        }
    }
}

impl From<i64> for Dim {
    fn from(size: i64) -> Dim {
        Dim::Fixed(size)
    }
}

impl From<&str> for Dim {
    fn from(name: &str) -> Dim {
        Dim::Sym(name.to_owned())
    }
}

/// An attribute value for [`ModelBuilder::node`].
#[derive(Debug, Clone, PartialEq)]
pub enum Attr {
    /// A single integer.
    Int(i64),
    /// A list of integers.
    Ints(Vec<i64>),
    /// A single float.
    Float(f32),
    /// A list of floats.
    Floats(Vec<f32>),
    /// A string.
    Str(String),
    /// A tensor.
    Tensor(Box<TensorProto>),
}

/// How the weights of a new layer are filled.
#[derive(Debug, Clone, PartialEq)]
pub enum Init {
    /// Normal with variance 2/fan_in (He initialisation).
    HeNormal,
    /// Normal with the given standard deviation.
    Normal(f32),
    /// All zeros.
    Zeros,
    /// These values, in row-major order.
    Values(Vec<f32>),
}

/// A convolution: output channels, kernel, stride, padding, groups, weights.
#[derive(Debug, Clone, PartialEq)]
pub struct Conv {
    /// Output channels.
    pub out_channels: i64,
    /// Square kernel size.
    pub kernel: i64,
    /// Stride on both spatial axes.
    pub stride: i64,
    /// Padding on every spatial side.
    pub pad: i64,
    /// Dilation on both spatial axes.
    pub dilation: i64,
    /// Channel groups; the input channel count for a depthwise convolution.
    pub groups: i64,
    /// How the weights are filled.
    pub weights: Init,
    /// The bias, if the convolution has one.
    pub bias: Option<Init>,
}

impl Conv {
    /// A `kernel`x`kernel` convolution to `out_channels`, stride 1, "same"
    /// padding for odd kernels, one group, He-normal weights, no bias.
    pub fn new(out_channels: i64, kernel: i64) -> Conv {
        Conv {
            out_channels,
            kernel,
            stride: 1,
            pad: kernel / 2,
            dilation: 1,
            groups: 1,
            weights: Init::HeNormal,
            bias: None,
        }
    }

    /// Sets the stride.
    pub fn stride(mut self, stride: i64) -> Conv {
        self.stride = stride;
        self
    }

    /// Sets the padding on every side.
    pub fn pad(mut self, pad: i64) -> Conv {
        self.pad = pad;
        self
    }

    /// Sets the number of groups.
    pub fn groups(mut self, groups: i64) -> Conv {
        self.groups = groups;
        self
    }

    /// Sets how the weights are filled.
    pub fn weights(mut self, weights: Init) -> Conv {
        self.weights = weights;
        self
    }

    /// Adds a zero bias.
    pub fn with_bias(mut self) -> Conv {
        self.bias = Some(Init::Zeros);
        self
    }
}

/// Batch normalisation statistics, one value per channel.
#[derive(Debug, Clone, PartialEq)]
pub struct BatchNorm {
    /// Scale.
    pub gamma: Vec<f32>,
    /// Shift.
    pub beta: Vec<f32>,
    /// Running mean.
    pub mean: Vec<f32>,
    /// Running variance.
    pub var: Vec<f32>,
    /// Added to the variance before the square root.
    pub epsilon: f32,
}

impl BatchNorm {
    /// Statistics that leave the input unchanged (up to epsilon).
    pub fn identity(channels: i64) -> BatchNorm {
        let channels = channels as usize;
        BatchNorm {
            gamma: vec![1.0; channels],
            beta: vec![0.0; channels],
            mean: vec![0.0; channels],
            var: vec![1.0; channels],
            epsilon: 1e-5,
        }
    }

    /// Per-channel scale and shift that the normalisation applies.
    pub fn scale_shift(&self) -> (Vec<f32>, Vec<f32>) {
        let scale: Vec<f32> =
            self.gamma.iter().zip(&self.var).map(|(g, v)| g / (v + self.epsilon).sqrt()).collect();
        let shift = self.beta.iter().zip(&self.mean).zip(&scale).map(|((b, m), s)| b - m * s);
        (scale.clone(), shift.collect())
    }
}

/// Whether an operation is written as its own ONNX op or spelled out in
/// elementary ops, as older exporters do.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Form {
    /// One op (`LayerNormalization`, `Gelu`).
    Fused,
    /// Elementary ops (`ReduceMean`, `Sub`, `Erf`, ...).
    Decomposed,
}

/// The pieces of one multi-head self-attention sub-layer.
#[derive(Debug, Clone, PartialEq)]
pub struct Attention {
    /// Number of heads; must divide the model width.
    pub heads: i64,
    /// An additive mask broadcastable to `[N, heads, T, T]`, added to the
    /// scaled scores before the softmax.
    pub mask: Option<String>,
    /// Static `[T, head_dim]` cosine and sine tables for a rotary position
    /// embedding of queries and keys.
    pub rotary: Option<(String, String)>,
}

/// Builds one ONNX model, node by node.
#[derive(Debug, Clone)]
pub struct ModelBuilder {
    graph_name: String,
    opset: i64,
    seed: u64,
    value_info: bool,
    doc: String,
    metadata: Vec<(String, String)>,
    nodes: Vec<NodeProto>,
    initializers: Vec<TensorProto>,
    inputs: Vec<ValueInfoProto>,
    outputs: Vec<ValueInfoProto>,
    facts: HashMap<String, Fact>,
    used_names: HashMap<String, u32>,
    konst_i64: HashMap<String, Vec<i64>>,
    konst_f32: HashMap<String, Vec<f32>>,
    external: Option<ExternalSink>,
}

/// Where [`ModelBuilder::external_weights`] puts large random weights.
#[derive(Debug, Clone)]
struct ExternalSink {
    location: String,
    min_elements: usize,
    next_offset: u64,
}

/// What the builder knows about one tensor.
#[derive(Debug, Clone, PartialEq)]
struct Fact {
    elem_type: i32,
    shape: Option<Vec<Dim>>,
}

impl ModelBuilder {
    /// A builder for a graph called `graph_name` importing the default
    /// domain at `opset`.
    pub fn new(graph_name: &str, opset: i64) -> ModelBuilder {
        ModelBuilder {
            graph_name: graph_name.to_owned(),
            opset,
            seed: 0,
            value_info: false,
            doc: String::new(),
            metadata: Vec::new(),
            nodes: Vec::new(),
            initializers: Vec::new(),
            inputs: Vec::new(),
            outputs: Vec::new(),
            facts: HashMap::new(),
            used_names: HashMap::new(),
            konst_i64: HashMap::new(),
            konst_f32: HashMap::new(),
            external: None,
        }
    }

    /// Sets the seed mixed into every random initializer.
    pub fn seed(mut self, seed: u64) -> ModelBuilder {
        self.seed = seed;
        self
    }

    /// Whether [`finish`](Self::finish) writes a `value_info` entry for
    /// every intermediate tensor whose shape is known.
    pub fn emit_value_info(mut self, on: bool) -> ModelBuilder {
        self.value_info = on;
        self
    }

    /// Keeps every random float weight of at least `min_elements` elements
    /// in the external file `location` (relative to the model's folder) as
    /// the ONNX external-data layout does, one after another at 64-byte
    /// aligned offsets; no value is drawn for them. The caller creates the
    /// file, [`external_bytes`](Self::external_bytes) long (sparse, for a
    /// model whose weights are only metadata in a test).
    pub fn external_weights(mut self, location: &str, min_elements: usize) -> ModelBuilder {
        self.external =
            Some(ExternalSink { location: location.to_owned(), min_elements, next_offset: 0 });
        self
    }

    /// Bytes the external weight file must have to hold every weight so far.
    pub fn external_bytes(&self) -> u64 {
        self.external.as_ref().map_or(0, |e| e.next_offset)
    }

    /// Sets the graph's doc string.
    pub fn doc(&mut self, doc: &str) {
        self.doc = doc.to_owned();
    }

    /// Adds a model metadata entry.
    pub fn metadata(&mut self, key: &str, value: &str) {
        self.metadata.push((key.to_owned(), value.to_owned()));
    }

    /// The opset the model imports.
    pub fn opset(&self) -> i64 {
        self.opset
    }

    /// The known shape of a tensor.
    pub fn shape(&self, name: &str) -> Option<&[Dim]> {
        self.facts.get(name).and_then(|fact| fact.shape.as_deref())
    }

    /// The size of one axis of a tensor; panics if it is not a known size.
    pub fn dim(&self, name: &str, axis: i64) -> i64 {
        let shape = self.shape(name).unwrap_or_else(|| panic!("no shape known for `{name}`"));
        let axis = if axis < 0 { shape.len() as i64 + axis } else { axis };
        shape[axis as usize]
            .fixed()
            .unwrap_or_else(|| panic!("axis {axis} of `{name}` is symbolic"))
    }

    /// Declares a float graph input.
    pub fn input(&mut self, name: &str, dims: &[Dim]) -> String {
        self.typed_input(name, DataType::Float, dims)
    }

    /// Declares a graph input of any element type.
    pub fn typed_input(&mut self, name: &str, elem_type: DataType, dims: &[Dim]) -> String {
        let name = self.fresh(name);
        let fact = Fact { elem_type: elem_type as i32, shape: Some(dims.to_vec()) };
        self.inputs.push(value_info(&name, &fact));
        self.facts.insert(name.clone(), fact);
        name
    }

    /// Records the shape of a tensor the builder cannot infer (an `Expand`
    /// to a shape computed at run time), so later helpers can read its axes.
    pub fn declare_shape(&mut self, name: &str, dims: &[Dim]) {
        let elem_type = self.fact(name).elem_type;
        self.facts.insert(name.to_owned(), Fact { elem_type, shape: Some(dims.to_vec()) });
    }

    /// Marks a tensor as a graph output.
    pub fn output(&mut self, name: &str) {
        let fact = self.fact(name).clone();
        self.outputs.push(value_info(name, &fact));
    }

    /// Adds a float initializer with the given values.
    pub fn init(&mut self, name: &str, dims: &[i64], values: Vec<f32>) -> String {
        assert_eq!(dims.iter().product::<i64>() as usize, values.len(), "initializer `{name}`");
        let name = self.fresh(name);
        let raw: Vec<u8> = values.iter().flat_map(|v| v.to_le_bytes()).collect();
        self.push_initializer(&name, DataType::Float, dims, raw);
        self.konst_f32.insert(name.clone(), values);
        name
    }

    /// Adds an int64 initializer with the given values.
    pub fn init_i64(&mut self, name: &str, dims: &[i64], values: Vec<i64>) -> String {
        assert_eq!(dims.iter().product::<i64>() as usize, values.len(), "initializer `{name}`");
        let name = self.fresh(name);
        let raw: Vec<u8> = values.iter().flat_map(|v| v.to_le_bytes()).collect();
        self.push_initializer(&name, DataType::Int64, dims, raw);
        self.konst_i64.insert(name.clone(), values);
        name
    }

    /// Adds an initializer of any element type from little-endian bytes.
    pub fn init_raw(
        &mut self,
        name: &str,
        elem_type: DataType,
        dims: &[i64],
        raw: Vec<u8>,
    ) -> String {
        let name = self.fresh(name);
        self.push_initializer(&name, elem_type, dims, raw);
        name
    }

    /// Adds a float initializer filled as `init` says; `fan_in` is used by
    /// [`Init::HeNormal`].
    pub fn init_filled(&mut self, name: &str, dims: &[i64], init: &Init, fan_in: i64) -> String {
        let count = dims.iter().product::<i64>() as usize;
        if matches!(init, Init::HeNormal | Init::Normal(_))
            && let Some(sink) = self.external.as_mut()
            && count >= sink.min_elements
        {
            let length = count as u64 * 4;
            let entry =
                |key: &str, value: String| StringStringEntryProto { key: key.to_owned(), value };
            let external_data = vec![
                entry("location", sink.location.clone()),
                entry("offset", sink.next_offset.to_string()),
                entry("length", length.to_string()),
            ];
            sink.next_offset = (sink.next_offset + length).next_multiple_of(64);
            let name = self.fresh(name);
            self.push_initializer(&name, DataType::Float, dims, Vec::new());
            let t = self.initializers.last_mut().expect("just pushed");
            t.external_data = external_data;
            t.data_location = DataLocation::External as i32;
            return name;
        }
        let values = match init {
            Init::HeNormal => self.normal(name, count, (2.0 / fan_in as f32).sqrt()),
            Init::Normal(std) => self.normal(name, count, *std),
            Init::Zeros => vec![0.0; count],
            Init::Values(values) => values.clone(),
        };
        self.init(name, dims, values)
    }

    /// A float scalar initializer.
    pub fn scalar(&mut self, name: &str, value: f32) -> String {
        self.init(name, &[], vec![value])
    }

    /// Draws `count` normal values with standard deviation `std`, seeded by
    /// the builder seed and `name`.
    pub fn normal(&self, name: &str, count: usize, std: f32) -> Vec<f32> {
        let mut rng = ChaCha8Rng::seed_from_u64(self.seed ^ fnv1a(name.as_bytes()));
        let dist = Normal::new(0.0f32, std).expect("a finite standard deviation");
        (0..count).map(|_| dist.sample(&mut rng)).collect()
    }

    /// Adds a node with one output, named after the node; returns the output.
    pub fn node(
        &mut self,
        op_type: &str,
        name: &str,
        inputs: &[&str],
        attrs: &[(&str, Attr)],
    ) -> String {
        self.node_multi(op_type, name, inputs, attrs, 1).remove(0)
    }

    /// Adds a node with `outputs` outputs; returns their names.
    pub fn node_multi(
        &mut self,
        op_type: &str,
        name: &str,
        inputs: &[&str],
        attrs: &[(&str, Attr)],
        outputs: usize,
    ) -> Vec<String> {
        for input in inputs {
            assert!(
                input.is_empty() || self.facts.contains_key(*input),
                "unknown tensor `{input}`"
            );
        }
        let name = self.fresh(name);
        let output_names: Vec<String> = match outputs {
            1 => vec![name.clone()],
            _ => (0..outputs).map(|k| self.fresh(&format!("{name}.out{k}"))).collect(),
        };
        let attribute = attrs.iter().map(|(key, value)| attribute(key, value)).collect();
        let node = NodeProto {
            input: inputs.iter().map(|s| (*s).to_owned()).collect(),
            output: output_names.clone(),
            name,
            op_type: op_type.to_owned(),
            attribute,
            ..NodeProto::default()
        };
        let facts = self.infer(&node);
        for (output, fact) in output_names.iter().zip(facts) {
            self.facts.insert(output.clone(), fact);
        }
        self.nodes.push(node);
        output_names
    }

    /// Adds a convolution (and its weight and bias initializers).
    pub fn conv(&mut self, name: &str, x: &str, conv: &Conv) -> String {
        let in_channels = self.dim(x, 1);
        assert_eq!(in_channels % conv.groups, 0, "`{name}`: groups must divide input channels");
        let per_group = in_channels / conv.groups;
        let k = conv.kernel;
        let fan_in = per_group * k * k;
        let w = self.init_filled(
            &format!("{name}.weight"),
            &[conv.out_channels, per_group, k, k],
            &conv.weights,
            fan_in,
        );
        let mut inputs = vec![x.to_owned(), w];
        if let Some(bias) = &conv.bias {
            inputs.push(self.init_filled(
                &format!("{name}.bias"),
                &[conv.out_channels],
                bias,
                fan_in,
            ));
        }
        let refs: Vec<&str> = inputs.iter().map(String::as_str).collect();
        let mut attrs = vec![
            ("kernel_shape", Attr::Ints(vec![k, k])),
            ("strides", Attr::Ints(vec![conv.stride, conv.stride])),
            ("pads", Attr::Ints(vec![conv.pad; 4])),
        ];
        if conv.dilation != 1 {
            attrs.push(("dilations", Attr::Ints(vec![conv.dilation, conv.dilation])));
        }
        if conv.groups != 1 {
            attrs.push(("group", Attr::Int(conv.groups)));
        }
        self.node("Conv", name, &refs, &attrs)
    }

    /// Adds a batch normalisation with the given statistics.
    pub fn batch_norm(&mut self, name: &str, x: &str, stats: &BatchNorm) -> String {
        let channels = stats.gamma.len() as i64;
        let scale = self.init(&format!("{name}.weight"), &[channels], stats.gamma.clone());
        let bias = self.init(&format!("{name}.bias"), &[channels], stats.beta.clone());
        let mean = self.init(&format!("{name}.running_mean"), &[channels], stats.mean.clone());
        let var = self.init(&format!("{name}.running_var"), &[channels], stats.var.clone());
        self.node(
            "BatchNormalization",
            name,
            &[x, &scale, &bias, &mean, &var],
            &[("epsilon", Attr::Float(stats.epsilon))],
        )
    }

    /// Adds a batch normalisation with identity statistics.
    pub fn bn(&mut self, name: &str, x: &str) -> String {
        let stats = BatchNorm::identity(self.dim(x, 1));
        self.batch_norm(name, x, &stats)
    }

    /// A convolution followed by batch normalisation; with `fold`, the
    /// normalisation is folded into the convolution's weights and bias the
    /// way exporters do, and only the convolution is emitted.
    pub fn conv_bn(
        &mut self,
        name: &str,
        bn_name: &str,
        x: &str,
        conv: &Conv,
        fold: bool,
    ) -> String {
        let stats = BatchNorm::identity(conv.out_channels);
        if !fold {
            let y = self.conv(name, x, conv);
            return self.batch_norm(bn_name, &y, &stats);
        }
        let per_group = self.dim(x, 1) / conv.groups;
        let fan_in = per_group * conv.kernel * conv.kernel;
        let per_out = (fan_in) as usize;
        let weights = match &conv.weights {
            Init::HeNormal => self.normal(
                &format!("{name}.weight"),
                per_out * conv.out_channels as usize,
                (2.0 / fan_in as f32).sqrt(),
            ),
            Init::Normal(std) => {
                self.normal(&format!("{name}.weight"), per_out * conv.out_channels as usize, *std)
            }
            Init::Zeros => vec![0.0; per_out * conv.out_channels as usize],
            Init::Values(values) => values.clone(),
        };
        let (scale, shift) = stats.scale_shift();
        let folded: Vec<f32> =
            weights.iter().enumerate().map(|(idx, w)| w * scale[idx / per_out]).collect();
        let folded =
            Conv { weights: Init::Values(folded), bias: Some(Init::Values(shift)), ..conv.clone() };
        self.conv(name, x, &folded)
    }

    /// `Relu`.
    pub fn relu(&mut self, name: &str, x: &str) -> String {
        self.node("Relu", name, &[x], &[])
    }

    /// ReLU6, written as `Clip(x, 0, 6)`.
    pub fn relu6(&mut self, name: &str, x: &str) -> String {
        let lo = self.scalar(&format!("{name}.min"), 0.0);
        let hi = self.scalar(&format!("{name}.max"), 6.0);
        self.node("Clip", name, &[x, &lo, &hi], &[])
    }

    /// `Sigmoid`.
    pub fn sigmoid(&mut self, name: &str, x: &str) -> String {
        self.node("Sigmoid", name, &[x], &[])
    }

    /// `Tanh`.
    pub fn tanh(&mut self, name: &str, x: &str) -> String {
        self.node("Tanh", name, &[x], &[])
    }

    /// Swish (SiLU): `x * Sigmoid(x)`.
    pub fn swish(&mut self, name: &str, x: &str) -> String {
        let gate = self.sigmoid(&format!("{name}.sigmoid"), x);
        self.mul(name, x, &gate)
    }

    /// GELU with the exact (erf) formula, as one `Gelu` op (opset 20) or as
    /// `x * 0.5 * (1 + Erf(x / sqrt 2))`.
    pub fn gelu(&mut self, name: &str, x: &str, form: Form) -> String {
        match form {
            Form::Fused => {
                assert!(
                    self.opset >= 20,
                    "`{name}`: Gelu needs opset 20, the builder has {}",
                    self.opset
                );
                self.node("Gelu", name, &[x], &[])
            }
            Form::Decomposed => {
                let sqrt2 = self.scalar(&format!("{name}.sqrt2"), std::f32::consts::SQRT_2);
                let scaled = self.node("Div", &format!("{name}.div"), &[x, &sqrt2], &[]);
                let erf = self.node("Erf", &format!("{name}.erf"), &[&scaled], &[]);
                let one = self.scalar(&format!("{name}.one"), 1.0);
                let shifted = self.node("Add", &format!("{name}.add_one"), &[&erf, &one], &[]);
                let gated = self.mul(&format!("{name}.mul"), x, &shifted);
                let half = self.scalar(&format!("{name}.half"), 0.5);
                self.mul(name, &gated, &half)
            }
        }
    }

    /// GELU with the tanh approximation, spelled out:
    /// `0.5 * x * (1 + Tanh(sqrt(2/pi) * (x + 0.044715 * x^3)))`.
    pub fn gelu_tanh(&mut self, name: &str, x: &str) -> String {
        let three = self.scalar(&format!("{name}.three"), 3.0);
        let cube = self.node("Pow", &format!("{name}.pow"), &[x, &three], &[]);
        let coeff = self.scalar(&format!("{name}.coeff"), 0.044715);
        let scaled_cube = self.mul(&format!("{name}.mul_cube"), &cube, &coeff);
        let inner = self.add(&format!("{name}.add_cube"), x, &scaled_cube);
        let factor = self.scalar(&format!("{name}.factor"), (2.0 / std::f32::consts::PI).sqrt());
        let arg = self.mul(&format!("{name}.mul_factor"), &inner, &factor);
        let tanh = self.tanh(&format!("{name}.tanh"), &arg);
        let one = self.scalar(&format!("{name}.one"), 1.0);
        let shifted = self.node("Add", &format!("{name}.add_one"), &[&tanh, &one], &[]);
        let gated = self.mul(&format!("{name}.mul"), x, &shifted);
        let half = self.scalar(&format!("{name}.half"), 0.5);
        self.mul(name, &gated, &half)
    }

    /// Layer normalisation over the last axis with unit scale and zero
    /// shift, as one `LayerNormalization` op (opset 17) or as
    /// `(x - mean) / sqrt(var + eps) * gamma + beta` in elementary ops.
    pub fn layer_norm(&mut self, name: &str, x: &str, form: Form) -> String {
        let width = self.dim(x, -1);
        let gamma = self.init(&format!("{name}.weight"), &[width], vec![1.0; width as usize]);
        let beta = self.init(&format!("{name}.bias"), &[width], vec![0.0; width as usize]);
        let epsilon = 1e-5;
        match form {
            Form::Fused => {
                assert!(self.opset >= 17, "`{name}`: LayerNormalization needs opset 17");
                self.node(
                    "LayerNormalization",
                    name,
                    &[x, &gamma, &beta],
                    &[("axis", Attr::Int(-1)), ("epsilon", Attr::Float(epsilon))],
                )
            }
            Form::Decomposed => {
                let mean = self.reduce_mean(&format!("{name}.mean"), x, &[-1]);
                let centred = self.node("Sub", &format!("{name}.sub"), &[x, &mean], &[]);
                let two = self.scalar(&format!("{name}.two"), 2.0);
                let square = self.node("Pow", &format!("{name}.pow"), &[&centred, &two], &[]);
                let var = self.reduce_mean(&format!("{name}.var"), &square, &[-1]);
                let eps = self.scalar(&format!("{name}.eps"), epsilon);
                let var_eps = self.node("Add", &format!("{name}.add_eps"), &[&var, &eps], &[]);
                let std = self.node("Sqrt", &format!("{name}.sqrt"), &[&var_eps], &[]);
                let normed = self.node("Div", &format!("{name}.div"), &[&centred, &std], &[]);
                let scaled = self.mul(&format!("{name}.mul"), &normed, &gamma);
                self.node("Add", name, &[&scaled, &beta], &[])
            }
        }
    }

    /// `ReduceMean` over `axes`, keeping them; the axes are an attribute
    /// before opset 18 and an input from then on.
    pub fn reduce_mean(&mut self, name: &str, x: &str, axes: &[i64]) -> String {
        if self.opset < 18 {
            return self.node("ReduceMean", name, &[x], &[("axes", Attr::Ints(axes.to_vec()))]);
        }
        let axes = self.init_i64(&format!("{name}.axes"), &[axes.len() as i64], axes.to_vec());
        self.node("ReduceMean", name, &[x, &axes], &[])
    }

    /// `Gemm(x, W^T) + b` for a `[N, in]` input, weights stored `[out, in]`.
    pub fn gemm(&mut self, name: &str, x: &str, out_features: i64, weights: &Init) -> String {
        let in_features = self.dim(x, -1);
        let w = self.init_filled(
            &format!("{name}.weight"),
            &[out_features, in_features],
            weights,
            in_features,
        );
        let b =
            self.init(&format!("{name}.bias"), &[out_features], vec![0.0; out_features as usize]);
        self.node("Gemm", name, &[x, &w, &b], &[("transB", Attr::Int(1))])
    }

    /// `MatMul(x, W)` with weights stored `[in, out]`, then `Add` of a zero
    /// bias when `bias` is set (the bias `Add` is named `{name}.bias_add`).
    pub fn linear(
        &mut self,
        name: &str,
        x: &str,
        out_features: i64,
        weights: &Init,
        bias: bool,
    ) -> String {
        let in_features = self.dim(x, -1);
        let w = self.init_filled(
            &format!("{name}.weight"),
            &[in_features, out_features],
            weights,
            in_features,
        );
        if !bias {
            return self.node("MatMul", name, &[x, &w], &[]);
        }
        let y = self.node("MatMul", name, &[x, &w], &[]);
        let b =
            self.init(&format!("{name}.bias"), &[out_features], vec![0.0; out_features as usize]);
        self.add(&format!("{name}.bias_add"), &y, &b)
    }

    /// `MatMul` of two tensors.
    pub fn matmul(&mut self, name: &str, a: &str, b: &str) -> String {
        self.node("MatMul", name, &[a, b], &[])
    }

    /// `Add`.
    pub fn add(&mut self, name: &str, a: &str, b: &str) -> String {
        self.node("Add", name, &[a, b], &[])
    }

    /// `Sum` of any number of tensors.
    pub fn sum(&mut self, name: &str, terms: &[&str]) -> String {
        self.node("Sum", name, terms, &[])
    }

    /// `Mul`.
    pub fn mul(&mut self, name: &str, a: &str, b: &str) -> String {
        self.node("Mul", name, &[a, b], &[])
    }

    /// `Sub`.
    pub fn sub(&mut self, name: &str, a: &str, b: &str) -> String {
        self.node("Sub", name, &[a, b], &[])
    }

    /// `Mul` by a constant initializer of shape `dims` (a layer scale, or a
    /// scalar when `dims` is empty).
    pub fn mul_const(&mut self, name: &str, x: &str, dims: &[i64], values: Vec<f32>) -> String {
        let konst = self.init(&format!("{name}.scale"), dims, values);
        self.mul(name, x, &konst)
    }

    /// `MaxPool` with a square window.
    pub fn max_pool(&mut self, name: &str, x: &str, kernel: i64, stride: i64, pad: i64) -> String {
        self.node("MaxPool", name, &[x], &pool_attrs(kernel, stride, pad))
    }

    /// `AveragePool` with a square window (padding not counted).
    pub fn avg_pool(&mut self, name: &str, x: &str, kernel: i64, stride: i64, pad: i64) -> String {
        self.node("AveragePool", name, &[x], &pool_attrs(kernel, stride, pad))
    }

    /// `GlobalAveragePool`.
    pub fn global_avg_pool(&mut self, name: &str, x: &str) -> String {
        self.node("GlobalAveragePool", name, &[x], &[])
    }

    /// `Flatten` at `axis`.
    pub fn flatten(&mut self, name: &str, x: &str, axis: i64) -> String {
        self.node("Flatten", name, &[x], &[("axis", Attr::Int(axis))])
    }

    /// `Reshape` to a constant shape (0 copies, -1 infers).
    pub fn reshape(&mut self, name: &str, x: &str, shape: &[i64]) -> String {
        let shape = self.init_i64(&format!("{name}.shape"), &[shape.len() as i64], shape.to_vec());
        self.node("Reshape", name, &[x, &shape], &[])
    }

    /// `Transpose` by `perm`.
    pub fn transpose(&mut self, name: &str, x: &str, perm: &[i64]) -> String {
        self.node("Transpose", name, &[x], &[("perm", Attr::Ints(perm.to_vec()))])
    }

    /// `Concat` along `axis`.
    pub fn concat(&mut self, name: &str, parts: &[&str], axis: i64) -> String {
        self.node("Concat", name, parts, &[("axis", Attr::Int(axis))])
    }

    /// `Unsqueeze` at `axes` (an input since opset 13).
    pub fn unsqueeze(&mut self, name: &str, x: &str, axes: &[i64]) -> String {
        let axes = self.init_i64(&format!("{name}.axes"), &[axes.len() as i64], axes.to_vec());
        self.node("Unsqueeze", name, &[x, &axes], &[])
    }

    /// `Resize` of the two spatial axes of an NCHW tensor by 2, nearest.
    pub fn upsample2x(&mut self, name: &str, x: &str) -> String {
        let rank = self.shape(x).map_or(4, <[Dim]>::len);
        let mut scales = vec![1.0; rank];
        scales[rank - 2] = 2.0;
        scales[rank - 1] = 2.0;
        let scales = self.init(&format!("{name}.scales"), &[rank as i64], scales);
        self.node("Resize", name, &[x, "", &scales], &[("mode", Attr::Str("nearest".to_owned()))])
    }

    /// `Slice` with constant starts, ends, axes and steps.
    pub fn slice(
        &mut self,
        name: &str,
        x: &str,
        starts: &[i64],
        ends: &[i64],
        axes: &[i64],
        steps: &[i64],
    ) -> String {
        let len = starts.len() as i64;
        let starts = self.init_i64(&format!("{name}.starts"), &[len], starts.to_vec());
        let ends = self.init_i64(&format!("{name}.ends"), &[len], ends.to_vec());
        let axes = self.init_i64(&format!("{name}.axes"), &[len], axes.to_vec());
        let steps = self.init_i64(&format!("{name}.steps"), &[len], steps.to_vec());
        self.node("Slice", name, &[x, &starts, &ends, &axes, &steps], &[])
    }

    /// `Pad` with zeros; `pads` lists all begins, then all ends.
    pub fn pad(&mut self, name: &str, x: &str, pads: &[i64]) -> String {
        let pads = self.init_i64(&format!("{name}.pads"), &[pads.len() as i64], pads.to_vec());
        self.node("Pad", name, &[x, &pads], &[("mode", Attr::Str("constant".to_owned()))])
    }

    /// `Softmax` along `axis`.
    pub fn softmax(&mut self, name: &str, x: &str, axis: i64) -> String {
        self.node("Softmax", name, &[x], &[("axis", Attr::Int(axis))])
    }

    /// `Gather` rows of an embedding table `[vocab, width]` by int64 ids.
    pub fn embedding(&mut self, name: &str, ids: &str, vocab: i64, width: i64) -> String {
        let table =
            self.init_filled(&format!("{name}.weight"), &[vocab, width], &Init::Normal(1.0), 1);
        self.node("Gather", name, &[&table, ids], &[("axis", Attr::Int(0))])
    }

    /// `QuantizeLinear` then `DequantizeLinear` with a scalar scale and a
    /// uint8 zero point of 128; returns the dequantized tensor.
    pub fn qdq(&mut self, name: &str, x: &str, scale: f32) -> String {
        let scale = self.scalar(&format!("{name}.scale"), scale);
        let zero = self.init_raw(&format!("{name}.zero_point"), DataType::Uint8, &[], vec![128]);
        let q = self.node("QuantizeLinear", &format!("{name}.quantize"), &[x, &scale, &zero], &[]);
        self.node("DequantizeLinear", &format!("{name}.dequantize"), &[&q, &scale, &zero], &[])
    }

    /// `rotate_half`: the last axis split in two halves `(x1, x2)` and
    /// recombined as `(-x2, x1)` with `Slice`, `Neg` and `Concat`.
    pub fn rotate_half(&mut self, name: &str, x: &str) -> String {
        let width = self.dim(x, -1);
        let half = width / 2;
        let x1 = self.slice(&format!("{name}.lo"), x, &[0], &[half], &[-1], &[1]);
        let x2 = self.slice(&format!("{name}.hi"), x, &[half], &[width], &[-1], &[1]);
        let neg = self.node("Neg", &format!("{name}.neg"), &[&x2], &[]);
        self.concat(name, &[&neg, &x1], -1)
    }

    /// Rotary position embedding: `x * cos + rotate_half(x) * sin`.
    pub fn rotary(&mut self, name: &str, x: &str, cos: &str, sin: &str) -> String {
        let with_cos = self.mul(&format!("{name}.mul_cos"), x, cos);
        let rotated = self.rotate_half(&format!("{name}.rotate_half"), x);
        let with_sin = self.mul(&format!("{name}.mul_sin"), &rotated, sin);
        self.add(name, &with_cos, &with_sin)
    }

    /// Multi-head self-attention on `[N, T, D]`: Q/K/V projections, scaled
    /// scores, optional additive mask, softmax, weighted values and an
    /// output projection. Returns the `[N, T, D]` output of the projection.
    pub fn attention(&mut self, name: &str, x: &str, spec: &Attention) -> String {
        let width = self.dim(x, -1);
        let heads = spec.heads;
        let head_dim = width / heads;
        let init = Init::Normal(1.0 / (width as f32).sqrt());
        let split = |b: &mut ModelBuilder, which: &str, perm: &[i64]| {
            let proj = b.linear(&format!("{name}.{which}"), x, width, &init, true);
            let heads_view =
                b.reshape(&format!("{name}.{which}.split"), &proj, &[0, 0, heads, head_dim]);
            b.transpose(&format!("{name}.{which}.heads"), &heads_view, perm)
        };
        let mut q = split(self, "q", &[0, 2, 1, 3]);
        let mut k = split(self, "k", &[0, 2, 1, 3]);
        let v = split(self, "v", &[0, 2, 1, 3]);
        if let Some((cos, sin)) = &spec.rotary {
            q = self.rotary(&format!("{name}.q.rotary"), &q, cos, sin);
            k = self.rotary(&format!("{name}.k.rotary"), &k, cos, sin);
        }
        let k_t = self.transpose(&format!("{name}.k.t"), &k, &[0, 1, 3, 2]);
        let scores = self.matmul(&format!("{name}.scores"), &q, &k_t);
        let scaled = self.mul_const(
            &format!("{name}.scale"),
            &scores,
            &[],
            vec![1.0 / (head_dim as f32).sqrt()],
        );
        let masked = match &spec.mask {
            Some(mask) => self.add(&format!("{name}.mask_add"), &scaled, mask),
            None => scaled,
        };
        let probs = self.softmax(&format!("{name}.softmax"), &masked, -1);
        let context = self.matmul(&format!("{name}.context"), &probs, &v);
        let merged = self.transpose(&format!("{name}.context.t"), &context, &[0, 2, 1, 3]);
        let merged = self.reshape(&format!("{name}.context.merge"), &merged, &[0, 0, width]);
        self.linear(&format!("{name}.out"), &merged, width, &init, true)
    }

    /// The finished model.
    pub fn finish(self) -> ModelProto {
        let mut value_infos = Vec::new();
        if self.value_info {
            let outputs: Vec<&str> = self.outputs.iter().map(|vi| vi.name.as_str()).collect();
            for node in &self.nodes {
                for output in &node.output {
                    let fact = &self.facts[output];
                    if fact.shape.is_some() && !outputs.contains(&output.as_str()) {
                        value_infos.push(value_info(output, fact));
                    }
                }
            }
        }
        let graph = GraphProto {
            node: self.nodes,
            name: self.graph_name,
            initializer: self.initializers,
            doc_string: self.doc,
            input: self.inputs,
            output: self.outputs,
            value_info: value_infos,
            ..GraphProto::default()
        };
        let metadata_props = self
            .metadata
            .into_iter()
            .map(|(key, value)| StringStringEntryProto { key, value })
            .collect();
        ModelProto {
            ir_version: IR_VERSION,
            opset_import: vec![OperatorSetIdProto { domain: String::new(), version: self.opset }],
            producer_name: PRODUCER.to_owned(),
            // The workspace's version, shared with shunt (Cargo.toml).
            producer_version: env!("CARGO_PKG_VERSION").to_owned(),
            graph: Some(graph),
            metadata_props,
            ..ModelProto::default()
        }
    }

    fn fresh(&mut self, hint: &str) -> String {
        let mut name = hint.to_owned();
        while self.used_names.contains_key(&name) {
            let count = self.used_names.get_mut(hint).expect("the hint is taken");
            *count += 1;
            name = format!("{hint}_{count}");
        }
        self.used_names.insert(name.clone(), 0);
        name
    }

    fn fact(&self, name: &str) -> &Fact {
        self.facts.get(name).unwrap_or_else(|| panic!("unknown tensor `{name}`"))
    }

    fn push_initializer(&mut self, name: &str, elem_type: DataType, dims: &[i64], raw: Vec<u8>) {
        self.initializers.push(TensorProto {
            dims: dims.to_vec(),
            data_type: elem_type as i32,
            name: name.to_owned(),
            raw_data: Bytes::from(raw),
            ..TensorProto::default()
        });
        let shape = dims.iter().map(|d| Dim::Fixed(*d)).collect();
        self.facts
            .insert(name.to_owned(), Fact { elem_type: elem_type as i32, shape: Some(shape) });
    }

    /// Output facts of a node from its inputs' facts, for the ops the
    /// generators use; unknown ops get an unknown float shape.
    fn infer(&self, node: &NodeProto) -> Vec<Fact> {
        let input =
            |slot: usize| node.input.get(slot).filter(|s| !s.is_empty()).map(|s| self.fact(s));
        let shape_of = |slot: usize| input(slot).and_then(|f| f.shape.clone());
        let first_type = input(0).map_or(DataType::Float as i32, |f| f.elem_type);
        let int_attr = |key: &str| node.attribute.iter().find(|a| a.name == key).map(|a| a.i);
        let ints_attr =
            |key: &str| node.attribute.iter().find(|a| a.name == key).map(|a| a.ints.clone());
        let konst = |slot: usize| node.input.get(slot).and_then(|s| self.konst_i64.get(s)).cloned();
        let same = |shape: Option<Vec<Dim>>| vec![Fact { elem_type: first_type, shape }];
        let float =
            |shape: Option<Vec<Dim>>| vec![Fact { elem_type: DataType::Float as i32, shape }];
        match node.op_type.as_str() {
            "Relu" | "Clip" | "Sigmoid" | "Tanh" | "Erf" | "Neg" | "Sqrt" | "Gelu" | "Identity"
            | "Softmax" | "LayerNormalization" | "BatchNormalization" | "Dropout" => {
                same(shape_of(0))
            }
            "Add" | "Sub" | "Mul" | "Div" | "Pow" | "Sum" | "Max" | "Min" => {
                let mut shape = shape_of(0);
                for slot in 1..node.input.len() {
                    shape = match (shape, shape_of(slot)) {
                        (Some(a), Some(b)) => broadcast(&a, &b),
                        _ => None,
                    };
                }
                same(shape)
            }
            "Conv" | "MaxPool" | "AveragePool" => {
                let Some(x) = shape_of(0) else { return same(None) };
                let kernel = ints_attr("kernel_shape").expect("kernel_shape");
                let strides = ints_attr("strides").unwrap_or_else(|| vec![1; kernel.len()]);
                let pads = ints_attr("pads").unwrap_or_else(|| vec![0; 2 * kernel.len()]);
                let dilations = ints_attr("dilations").unwrap_or_else(|| vec![1; kernel.len()]);
                let channels = match node.op_type.as_str() {
                    "Conv" => {
                        Dim::Fixed(shape_of(1).expect("conv weights")[0].fixed().expect("fixed"))
                    }
                    _ => x[1].clone(),
                };
                let mut out = vec![x[0].clone(), channels];
                for axis in 0..kernel.len() {
                    out.push(match x[axis + 2].fixed() {
                        // [O2] ONNX Conv: floor((in + pad_begin + pad_end
                        // - dilation * (kernel - 1) - 1) / stride) + 1.
                        Some(size) => Dim::Fixed(
                            (size + pads[axis] + pads[axis + kernel.len()]
                                - dilations[axis] * (kernel[axis] - 1)
                                - 1)
                            .div_euclid(strides[axis])
                                + 1,
                        ),
                        None => x[axis + 2].clone(),
                    });
                }
                same(Some(out))
            }
            "GlobalAveragePool" => same(shape_of(0).map(|x| {
                let mut out = x[..2].to_vec();
                out.extend(std::iter::repeat_n(Dim::Fixed(1), x.len() - 2));
                out
            })),
            "Flatten" => same(shape_of(0).map(|x| {
                let axis = int_attr("axis").unwrap_or(1) as usize;
                vec![product(&x[..axis]), product(&x[axis..])]
            })),
            "Reshape" => {
                same(shape_of(0).zip(konst(1)).and_then(|(x, target)| reshape_dims(&x, &target)))
            }
            "Transpose" => same(shape_of(0).map(|x| {
                let perm = ints_attr("perm").unwrap_or_else(|| (0..x.len() as i64).rev().collect());
                perm.iter().map(|p| x[*p as usize].clone()).collect()
            })),
            "Concat" => {
                let shapes: Option<Vec<Vec<Dim>>> = (0..node.input.len()).map(shape_of).collect();
                same(shapes.map(|shapes| {
                    let rank = shapes[0].len() as i64;
                    let axis = int_attr("axis").expect("axis");
                    let axis = if axis < 0 { axis + rank } else { axis } as usize;
                    let mut out = shapes[0].clone();
                    let total: Option<i64> = shapes.iter().map(|s| s[axis].fixed()).sum();
                    out[axis] = Dim::Fixed(total.expect("concat of known sizes"));
                    out
                }))
            }
            "Unsqueeze" => same(shape_of(0).zip(konst(1)).map(|(x, axes)| {
                let rank = (x.len() + axes.len()) as i64;
                let mut axes: Vec<i64> =
                    axes.iter().map(|a| if *a < 0 { a + rank } else { *a }).collect();
                axes.sort_unstable();
                let mut out = x.clone();
                for axis in axes {
                    out.insert(axis as usize, Dim::Fixed(1));
                }
                out
            })),
            "ReduceMean" => {
                let axes = ints_attr("axes").filter(|a| !a.is_empty()).or_else(|| konst(1));
                same(shape_of(0).zip(axes).map(|(x, axes)| {
                    let rank = x.len() as i64;
                    let keep = int_attr("keepdims").unwrap_or(1) != 0;
                    let axes: Vec<i64> =
                        axes.iter().map(|a| if *a < 0 { a + rank } else { *a }).collect();
                    let kept = x.iter().enumerate().filter_map(|(idx, d)| {
                        match axes.contains(&(idx as i64)) {
                            true if keep => Some(Dim::Fixed(1)),
                            true => None,
                            false => Some(d.clone()),
                        }
                    });
                    kept.collect()
                }))
            }
            "Resize" => {
                let scales = node.input.get(2).and_then(|s| self.konst_f32.get(s));
                same(shape_of(0).zip(scales).map(|(x, scales)| {
                    x.iter()
                        .zip(scales)
                        .map(|(d, s)| match d.fixed() {
                            Some(size) => Dim::Fixed((size as f32 * s).floor() as i64),
                            None => d.clone(),
                        })
                        .collect()
                }))
            }
            "Slice" => {
                let Some(x) = shape_of(0) else { return same(None) };
                let (Some(starts), Some(ends)) = (konst(1), konst(2)) else { return same(None) };
                let rank = x.len() as i64;
                let axes = konst(3).unwrap_or_else(|| (0..starts.len() as i64).collect());
                let steps = konst(4).unwrap_or_else(|| vec![1; starts.len()]);
                let mut out = x.clone();
                for idx in 0..starts.len() {
                    let axis = if axes[idx] < 0 { axes[idx] + rank } else { axes[idx] } as usize;
                    out[axis] = match x[axis].fixed() {
                        Some(size) => {
                            Dim::Fixed(slice_len(size, starts[idx], ends[idx], steps[idx]))
                        }
                        None if starts[idx] == 0 && ends[idx] == i64::MAX && steps[idx] == 1 => {
                            x[axis].clone()
                        }
                        None => return same(None),
                    };
                }
                same(Some(out))
            }
            "Pad" => same(shape_of(0).zip(konst(1)).map(|(x, pads)| {
                let rank = x.len();
                let padded = x.iter().enumerate().map(|(axis, d)| match d.fixed() {
                    Some(size) => Dim::Fixed(size + pads[axis] + pads[axis + rank]),
                    None => d.clone(),
                });
                padded.collect()
            })),
            "MatMul" => same(shape_of(0).zip(shape_of(1)).and_then(|(a, b)| {
                let (a_rows, b_cols) = (a[a.len() - 2].clone(), b[b.len() - 1].clone());
                let mut batch = broadcast(&a[..a.len() - 2], &b[..b.len() - 2])?;
                batch.push(a_rows);
                batch.push(b_cols);
                Some(batch)
            })),
            "Gemm" => {
                let trans_a = int_attr("transA").unwrap_or(0) != 0;
                let trans_b = int_attr("transB").unwrap_or(0) != 0;
                same(shape_of(0).zip(shape_of(1)).map(|(a, b)| {
                    let rows = if trans_a { a[1].clone() } else { a[0].clone() };
                    let cols = if trans_b { b[0].clone() } else { b[1].clone() };
                    vec![rows, cols]
                }))
            }
            "Gather" => {
                let elem_type = input(0).map_or(DataType::Float as i32, |f| f.elem_type);
                let shape = shape_of(0).zip(shape_of(1)).map(|(data, ids)| {
                    let mut out = ids.clone();
                    out.extend_from_slice(&data[1..]);
                    out
                });
                vec![Fact { elem_type, shape }]
            }
            "QuantizeLinear" => {
                let elem_type = input(2).map_or(DataType::Uint8 as i32, |f| f.elem_type);
                vec![Fact { elem_type, shape: shape_of(0) }]
            }
            "DequantizeLinear" => float(shape_of(0)),
            _ => (0..node.output.len())
                .map(|_| Fact { elem_type: DataType::Float as i32, shape: None })
                .collect(),
        }
    }
}

/// Removes every node name, as some exporters leave them empty.
pub fn strip_node_names(model: &mut ModelProto) {
    for node in &mut graph_mut(model).node {
        node.name.clear();
    }
}

/// Removes every `value_info` entry.
pub fn strip_value_info(model: &mut ModelProto) {
    graph_mut(model).value_info.clear();
}

/// Rewrites the node list in another valid topological order, chosen by
/// `seed`: the same seed always gives the same order. When the graph admits
/// more than one order, the result differs from the current one.
pub fn reorder_nodes(model: &mut ModelProto, seed: u64) {
    use rand::Rng;

    let graph = graph_mut(model);
    let producer: HashMap<&str, usize> = graph
        .node
        .iter()
        .enumerate()
        .flat_map(|(idx, node)| node.output.iter().map(move |out| (out.as_str(), idx)))
        .collect();
    let count = graph.node.len();
    let mut consumers: Vec<Vec<usize>> = vec![Vec::new(); count];
    let mut pending = vec![0usize; count];
    for (idx, node) in graph.node.iter().enumerate() {
        let mut preds: Vec<usize> =
            node.input.iter().filter_map(|i| producer.get(i.as_str()).copied()).collect();
        preds.sort_unstable();
        preds.dedup();
        pending[idx] = preds.len();
        for pred in preds {
            consumers[pred].push(idx);
        }
    }
    let identity: Vec<usize> = (0..count).collect();
    let mut order = identity.clone();
    for attempt in 0..16u64 {
        let mut rng = ChaCha8Rng::seed_from_u64(seed.wrapping_mul(0x9e37_79b9_7f4a_7c15) ^ attempt);
        let mut pending = pending.clone();
        let mut ready: Vec<usize> = (0..count).filter(|idx| pending[*idx] == 0).collect();
        order.clear();
        while !ready.is_empty() {
            let pick = ready.swap_remove(rng.random_range(0..ready.len()));
            order.push(pick);
            for next in &consumers[pick] {
                pending[*next] -= 1;
                if pending[*next] == 0 {
                    ready.push(*next);
                }
            }
        }
        assert_eq!(order.len(), count, "the graph has a cycle");
        if order != identity {
            break;
        }
    }
    let mut nodes: Vec<Option<NodeProto>> =
        std::mem::take(&mut graph.node).into_iter().map(Some).collect();
    graph.node = order.iter().map(|idx| nodes[*idx].take().expect("each node once")).collect();
}

fn graph_mut(model: &mut ModelProto) -> &mut GraphProto {
    model.graph.as_mut().expect("a model with a graph")
}

fn attribute(name: &str, value: &Attr) -> AttributeProto {
    let mut attr = AttributeProto { name: name.to_owned(), ..AttributeProto::default() };
    let kind = match value {
        Attr::Int(i) => {
            attr.i = *i;
            AttributeType::Int
        }
        Attr::Ints(ints) => {
            attr.ints = ints.clone();
            AttributeType::Ints
        }
        Attr::Float(f) => {
            attr.f = *f;
            AttributeType::Float
        }
        Attr::Floats(floats) => {
            attr.floats = floats.clone();
            AttributeType::Floats
        }
        Attr::Str(s) => {
            attr.s = s.as_bytes().to_vec();
            AttributeType::String
        }
        Attr::Tensor(t) => {
            attr.t = Some(t.clone());
            AttributeType::Tensor
        }
    };
    attr.r#type = kind as i32;
    attr
}

fn value_info(name: &str, fact: &Fact) -> ValueInfoProto {
    let shape = fact.shape.as_ref().map(|dims| TensorShapeProto {
        dim: dims
            .iter()
            .map(|d| Dimension {
                value: Some(match d {
                    Dim::Fixed(size) => dimension::Value::DimValue(*size),
                    Dim::Sym(sym) => dimension::Value::DimParam(sym.clone()),
                }),
                ..Dimension::default()
            })
            .collect(),
    });
    let tensor = type_proto::Tensor { elem_type: fact.elem_type, shape };
    ValueInfoProto {
        name: name.to_owned(),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(tensor)),
            ..TypeProto::default()
        }),
        ..ValueInfoProto::default()
    }
}

fn pool_attrs(kernel: i64, stride: i64, pad: i64) -> Vec<(&'static str, Attr)> {
    vec![
        ("kernel_shape", Attr::Ints(vec![kernel, kernel])),
        ("strides", Attr::Ints(vec![stride, stride])),
        ("pads", Attr::Ints(vec![pad; 4])),
    ]
}

/// Multidirectional broadcasting [O1]; `None` when the shapes clash.
fn broadcast(a: &[Dim], b: &[Dim]) -> Option<Vec<Dim>> {
    let rank = a.len().max(b.len());
    let at = |s: &[Dim], idx: usize| match idx + s.len() >= rank {
        true => s[idx + s.len() - rank].clone(),
        false => Dim::Fixed(1),
    };
    (0..rank)
        .map(|idx| match (at(a, idx), at(b, idx)) {
            (Dim::Fixed(1), other) | (other, Dim::Fixed(1)) => Some(other),
            (x, y) if x == y => Some(x),
            _ => None,
        })
        .collect()
}

fn product(dims: &[Dim]) -> Dim {
    match dims.iter().map(Dim::fixed).collect::<Option<Vec<i64>>>() {
        Some(sizes) => Dim::Fixed(sizes.iter().product()),
        None if dims.len() == 1 => dims[0].clone(),
        None => {
            let names: Vec<String> = dims
                .iter()
                .map(|d| match d {
                    Dim::Fixed(size) => size.to_string(),
                    Dim::Sym(sym) => sym.clone(),
                })
                .collect();
            Dim::Sym(names.join("*"))
        }
    }
}

/// Reshape to `target` (0 copies the input axis, -1 takes the rest); the
/// inferred axis needs every symbolic input axis to be copied.
pub fn reshape_dims(x: &[Dim], target: &[i64]) -> Option<Vec<Dim>> {
    let mut out: Vec<Option<Dim>> = Vec::new();
    let mut copied = Vec::new();
    for (idx, t) in target.iter().enumerate() {
        out.push(match t {
            0 => {
                copied.push(idx);
                Some(x[idx].clone())
            }
            -1 => None,
            size => Some(Dim::Fixed(*size)),
        });
    }
    let free: i64 = x
        .iter()
        .enumerate()
        .filter(|(idx, _)| !copied.contains(idx))
        .map(|(_, d)| d.fixed())
        .product::<Option<i64>>()?;
    let known: i64 = out.iter().flatten().filter_map(Dim::fixed).product::<i64>()
        / copied.iter().filter_map(|idx| x[*idx].fixed()).product::<i64>();
    out.into_iter().map(|d| d.or(Some(Dim::Fixed(free / known)))).collect()
}

/// The length of `Slice` over an axis of `size` (the ONNX clamping rules).
pub fn slice_len(size: i64, start: i64, end: i64, step: i64) -> i64 {
    let clamp = |v: i64, lo: i64, hi: i64| v.max(lo).min(hi);
    let norm = |v: i64| if v < 0 { v.saturating_add(size) } else { v };
    if step > 0 {
        let (start, end) = (clamp(norm(start), 0, size), clamp(norm(end), 0, size));
        ((end - start).max(0) + step - 1) / step
    } else {
        let (start, end) = (clamp(norm(start), 0, size - 1), clamp(norm(end), -1, size - 1));
        ((start - end).max(0) + (-step) - 1) / (-step)
    }
}

fn fnv1a(bytes: &[u8]) -> u64 {
    let mut hash = 0xcbf2_9ce4_8422_2325u64;
    for byte in bytes {
        hash ^= u64::from(*byte);
        hash = hash.wrapping_mul(0x0100_0000_01b3);
    }
    hash
}
