//! ONNX import: a float LSTM read from an `.onnx` file's graph
//! (DESIGN.md section 4), called by [`crate::import::import`] for paths
//! ending in `.onnx`.
//!
//! # Reading
//!
//! The file is decoded by `prost` into the few ONNX messages declared in
//! [`proto`] (field numbers from the official `onnx.proto`; fields this
//! module does not declare are skipped). A file over [`MAX_ONNX_BYTES`] is
//! refused before it is read, and a tensor over
//! [`crate::import::MAX_TENSOR_ELEMENTS`] elements before its data is
//! decoded.
//!
//! # What is accepted
//!
//! The importer follows the data path from the graph's one input through the
//! nodes, in the file's (topological) order, to the graph's one output, and
//! keeps track of what each axis of each value means (time, batch,
//! direction, features, or an inserted size-1 axis). On that path it accepts:
//!
//! - `LSTM` nodes, each one a layer. Only what the standard's default LSTM
//!   computes: one forward direction, sigmoid/tanh/tanh, no peepholes `P`,
//!   no `clip`, `input_forget = 0`, no `sequence_lens`, `layout` 0 or 1,
//!   initial states absent or proven zero. `W [1, 4H, X]`,
//!   `R [1, 4H, H]` and `B [1, 8H]` (`Wb` then `Rb`, summed in f32) are
//!   stacked in the standard's gate order `i, o, f, c` and reordered into
//!   Lapwing's `i, f, g, o` (`c` is the candidate, Lapwing's `g`). Only the
//!   per-step output `Y` may be used; `Y_h`/`Y_c` may not.
//! - a linear head after the last LSTM: `Gemm` (`transA = 0`, `alpha`,
//!   `beta` folded into the weights and bias) or `MatMul` with a constant
//!   `[H, Y]` matrix, optionally followed by `Add` of a constant bias.
//! - layout glue: `Transpose`, `Squeeze`/`Unsqueeze` of size-1 axes,
//!   `Reshape` that only drops size-1 direction (or batch) axes, `Identity`,
//!   and `Shape` of a data-path value.
//!
//! Values off the data path (initializers, `Constant` nodes and shape
//! arithmetic: `Shape`, `Gather`, `Unsqueeze`, `Squeeze`, `Concat`, `Cast`,
//! `Slice`, `Reshape`, `Expand`, `ConstantOfShape`) are evaluated, with
//! symbolic sizes where a size depends on the input, as far as needed to
//! prove that an LSTM's initial state is all zeros. Anything else on the
//! data path, or any initial state not proven zero, is refused with an error
//! naming the node and what it does; an unsupported LSTM attribute or input
//! is refused naming it.
//!
//! Lapwing runs one step at a time with batch size 1, so the graph input's
//! time and batch axes become the stream of rows a data file holds; the
//! importer's notes say which axis was which.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::fmt;
use std::path::Path;

use anyhow::{anyhow, bail, Context, Result};
use prost::Message;

use crate::float_model::{FloatHeadData, FloatLayerData, FloatModelData};
use crate::import::{Container, ImportOptions, Imported, Layout, MAX_TENSOR_ELEMENTS};

/// Largest `.onnx` file read (1 GiB), checked before reading.
pub const MAX_ONNX_BYTES: u64 = 1 << 30;

/// The ONNX messages this importer reads, declared by hand for `prost` with
/// the field numbers of the official `onnx.proto` (proto2). Only the fields
/// used here are declared; the decoder skips the others.
pub mod proto {
    /// `ModelProto`: the file's top-level message.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct ModelProto {
        /// IR version of the file format.
        #[prost(int64, optional, tag = "1")]
        pub ir_version: Option<i64>,
        /// Operator sets the graph uses.
        #[prost(message, repeated, tag = "8")]
        pub opset_import: Vec<OperatorSetIdProto>,
        /// The tool that wrote the file.
        #[prost(string, optional, tag = "2")]
        pub producer_name: Option<String>,
        /// Its version.
        #[prost(string, optional, tag = "3")]
        pub producer_version: Option<String>,
        /// The computation.
        #[prost(message, optional, tag = "7")]
        pub graph: Option<GraphProto>,
    }

    /// `OperatorSetIdProto`: an operator set and its version.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct OperatorSetIdProto {
        /// Empty or `ai.onnx` for the standard operators.
        #[prost(string, optional, tag = "1")]
        pub domain: Option<String>,
        /// Operator set version.
        #[prost(int64, optional, tag = "2")]
        pub version: Option<i64>,
    }

    /// `GraphProto`: nodes in topological order, constants, inputs, outputs.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct GraphProto {
        /// The nodes, topologically sorted.
        #[prost(message, repeated, tag = "1")]
        pub node: Vec<NodeProto>,
        /// The graph's name.
        #[prost(string, optional, tag = "2")]
        pub name: Option<String>,
        /// Constant tensors (weights).
        #[prost(message, repeated, tag = "5")]
        pub initializer: Vec<TensorProto>,
        /// Sparse constant tensors (refused when used).
        #[prost(message, repeated, tag = "15")]
        pub sparse_initializer: Vec<SparseTensorProto>,
        /// Graph inputs (older files list initializers here too).
        #[prost(message, repeated, tag = "11")]
        pub input: Vec<ValueInfoProto>,
        /// Graph outputs.
        #[prost(message, repeated, tag = "12")]
        pub output: Vec<ValueInfoProto>,
    }

    /// `NodeProto`: one operator application.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct NodeProto {
        /// Input value names (empty string: an omitted optional input).
        #[prost(string, repeated, tag = "1")]
        pub input: Vec<String>,
        /// Output value names.
        #[prost(string, repeated, tag = "2")]
        pub output: Vec<String>,
        /// The node's name (may be empty).
        #[prost(string, optional, tag = "3")]
        pub name: Option<String>,
        /// The operator, e.g. `LSTM`.
        #[prost(string, optional, tag = "4")]
        pub op_type: Option<String>,
        /// The operator's domain; empty for the standard operators.
        #[prost(string, optional, tag = "7")]
        pub domain: Option<String>,
        /// Attributes.
        #[prost(message, repeated, tag = "5")]
        pub attribute: Vec<AttributeProto>,
    }

    /// `AttributeProto`: a named attribute value.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct AttributeProto {
        /// The attribute's name.
        #[prost(string, optional, tag = "1")]
        pub name: Option<String>,
        /// `AttributeType`: 1 FLOAT, 2 INT, 3 STRING, 4 TENSOR, 6 FLOATS, 7 INTS, 8 STRINGS, ...
        #[prost(int32, optional, tag = "20")]
        pub r#type: Option<i32>,
        /// A float.
        #[prost(float, optional, tag = "2")]
        pub f: Option<f32>,
        /// An integer.
        #[prost(int64, optional, tag = "3")]
        pub i: Option<i64>,
        /// A string (bytes, normally UTF-8).
        #[prost(bytes = "vec", optional, tag = "4")]
        pub s: Option<Vec<u8>>,
        /// A tensor.
        #[prost(message, optional, tag = "5")]
        pub t: Option<TensorProto>,
        /// Floats.
        #[prost(float, repeated, tag = "7")]
        pub floats: Vec<f32>,
        /// Integers.
        #[prost(int64, repeated, tag = "8")]
        pub ints: Vec<i64>,
        /// Strings.
        #[prost(bytes = "vec", repeated, tag = "9")]
        pub strings: Vec<Vec<u8>>,
    }

    /// `TensorProto`: a constant tensor.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct TensorProto {
        /// Dimensions.
        #[prost(int64, repeated, tag = "1")]
        pub dims: Vec<i64>,
        /// `DataType`: 1 FLOAT, 6 INT32, 7 INT64, 11 DOUBLE, ...
        #[prost(int32, optional, tag = "2")]
        pub data_type: Option<i32>,
        /// FLOAT values (when `raw_data` is not used).
        #[prost(float, repeated, tag = "4")]
        pub float_data: Vec<f32>,
        /// INT32 values.
        #[prost(int32, repeated, tag = "5")]
        pub int32_data: Vec<i32>,
        /// INT64 values.
        #[prost(int64, repeated, tag = "7")]
        pub int64_data: Vec<i64>,
        /// The tensor's name.
        #[prost(string, optional, tag = "8")]
        pub name: Option<String>,
        /// Little-endian values.
        #[prost(bytes = "vec", optional, tag = "9")]
        pub raw_data: Option<Vec<u8>>,
        /// DOUBLE values.
        #[prost(double, repeated, tag = "10")]
        pub double_data: Vec<f64>,
        /// Where the data is kept outside the file (refused).
        #[prost(message, repeated, tag = "13")]
        pub external_data: Vec<StringStringEntryProto>,
        /// 0 in this file, 1 in an external file (refused).
        #[prost(int32, optional, tag = "14")]
        pub data_location: Option<i32>,
    }

    /// `SparseTensorProto`: only its values' name is read (to refuse it).
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct SparseTensorProto {
        /// The non-zero values; their name is the tensor's.
        #[prost(message, optional, tag = "1")]
        pub values: Option<TensorProto>,
    }

    /// `StringStringEntryProto`: a key/value pair.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct StringStringEntryProto {
        /// Key.
        #[prost(string, optional, tag = "1")]
        pub key: Option<String>,
        /// Value.
        #[prost(string, optional, tag = "2")]
        pub value: Option<String>,
    }

    /// `ValueInfoProto`: a graph input's or output's name and type.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct ValueInfoProto {
        /// The value's name.
        #[prost(string, optional, tag = "1")]
        pub name: Option<String>,
        /// Its type.
        #[prost(message, optional, tag = "2")]
        pub r#type: Option<TypeProto>,
    }

    /// `TypeProto`; of its `oneof` only the tensor case is declared.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct TypeProto {
        /// A dense tensor type.
        #[prost(message, optional, tag = "1")]
        pub tensor_type: Option<TypeProtoTensor>,
    }

    /// `TypeProto.Tensor`: element type and shape.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct TypeProtoTensor {
        /// A `TensorProto.DataType`.
        #[prost(int32, optional, tag = "1")]
        pub elem_type: Option<i32>,
        /// The shape, if declared.
        #[prost(message, optional, tag = "2")]
        pub shape: Option<TensorShapeProto>,
    }

    /// `TensorShapeProto`.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct TensorShapeProto {
        /// The dimensions.
        #[prost(message, repeated, tag = "1")]
        pub dim: Vec<Dimension>,
    }

    /// `TensorShapeProto.Dimension`: a number, a name, or neither.
    #[derive(Clone, PartialEq, prost::Message)]
    pub struct Dimension {
        /// A fixed size.
        #[prost(int64, optional, tag = "1")]
        pub dim_value: Option<i64>,
        /// A symbolic size, e.g. `T`.
        #[prost(string, optional, tag = "2")]
        pub dim_param: Option<String>,
    }
}

use proto::{AttributeProto, GraphProto, ModelProto, NodeProto, TensorProto};

// TensorProto.DataType values used here.
const DT_FLOAT: i32 = 1;
const DT_INT32: i32 = 6;
const DT_INT64: i32 = 7;
const DT_DOUBLE: i32 = 11;

// AttributeProto.AttributeType values used here.
const AT_FLOAT: i32 = 1;
const AT_INT: i32 = 2;
const AT_STRING: i32 = 3;
const AT_TENSOR: i32 = 4;
const AT_INTS: i32 = 7;
const AT_STRINGS: i32 = 8;

/// The name of a `TensorProto.DataType`, for messages.
fn dtype_name(t: i32) -> String {
    let name = match t {
        0 => "UNDEFINED",
        1 => "FLOAT",
        2 => "UINT8",
        3 => "INT8",
        4 => "UINT16",
        5 => "INT16",
        6 => "INT32",
        7 => "INT64",
        8 => "STRING",
        9 => "BOOL",
        10 => "FLOAT16",
        11 => "DOUBLE",
        12 => "UINT32",
        13 => "UINT64",
        16 => "BFLOAT16",
        _ => return format!("data type {t}"),
    };
    name.to_string()
}

// ---------------------------------------------------------------------------
// Values

/// What an axis of a data-path value means.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Role {
    Time,
    Batch,
    /// The LSTM's `num_directions` axis (size 1).
    Dir,
    Feat,
    /// A size-1 axis inserted by `Unsqueeze`.
    Unit,
    /// Axis `i` of the graph input, until the first LSTM says what it is.
    Input(usize),
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct Axis {
    role: Role,
    size: Option<u64>,
}

impl Axis {
    fn new(role: Role, size: Option<u64>) -> Axis {
        Axis { role, size }
    }
}

/// One entry of an integer tensor: known, a data-path axis's size, or
/// unknown.
#[derive(Clone, Copy, Debug, PartialEq)]
enum Dim {
    Known(i64),
    Axis(Axis),
    Unknown,
}

impl Dim {
    fn value(self) -> Option<i64> {
        match self {
            Dim::Known(v) => Some(v),
            Dim::Axis(a) => a.size.and_then(|s| i64::try_from(s).ok()),
            Dim::Unknown => None,
        }
    }
}

impl fmt::Display for Dim {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.value() {
            Some(v) => write!(f, "{v}"),
            None => f.write_str("?"),
        }
    }
}

/// Where a data-path value is along the chain.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Stage {
    /// The graph input, before any LSTM.
    Input,
    /// After an LSTM.
    Lstm,
    /// After the head's `MatMul`, before its optional bias.
    HeadMatMul,
    /// After the whole head.
    Head,
}

#[derive(Clone, Debug)]
struct Stream {
    axes: Vec<Axis>,
    stage: Stage,
    /// Counts the data-path nodes before it: the output must be the last.
    id: usize,
}

#[derive(Clone, Debug)]
enum Value {
    /// On the data path.
    Stream(Stream),
    /// A known float tensor (row-major).
    Floats { shape: Vec<usize>, data: Vec<f32> },
    /// An integer tensor whose entries may be symbolic sizes.
    Ints { shape: Vec<usize>, data: Vec<Dim> },
    /// A float tensor known to be all zeros, shape possibly symbolic.
    Zeros { dims: Vec<Dim> },
    /// Not evaluated; the reason, given if something needs the value.
    Opaque(String),
}

impl Value {
    fn kind(&self) -> &'static str {
        match self {
            Value::Stream(_) => "a data-path value",
            Value::Floats { .. } => "a float constant",
            Value::Ints { .. } => "an integer constant",
            Value::Zeros { .. } => "a zero tensor",
            Value::Opaque(_) => "a value Lapwing does not evaluate",
        }
    }

    fn dims(&self) -> Option<Vec<Dim>> {
        match self {
            Value::Floats { shape, .. } | Value::Ints { shape, .. } => {
                Some(shape.iter().map(|d| Dim::Known(i64::try_from(*d).unwrap_or(i64::MAX))).collect())
            }
            Value::Zeros { dims } => Some(dims.clone()),
            Value::Stream(s) => Some(s.axes.iter().map(|a| Dim::Axis(*a)).collect()),
            Value::Opaque(_) => None,
        }
    }
}

fn shape_text(dims: &[Dim]) -> String {
    let v: Vec<String> = dims.iter().map(|d| d.to_string()).collect();
    format!("[{}]", v.join(", "))
}

// ---------------------------------------------------------------------------
// Entry point

/// Reads the float LSTM in the `.onnx` file at `path` (see the module docs).
///
/// Error messages do not repeat the path; [`crate::import::import`] adds it.
///
/// # Errors
/// A missing, empty, oversized or undecodable file; a graph without exactly
/// one input and one output; a node on the data path that is not accepted
/// (named, with its operator); an LSTM attribute or input Lapwing does not
/// compute (named); an initial state not proven zero; weights of the wrong
/// shape, data type or size (over [`MAX_TENSOR_ELEMENTS`]), stored outside
/// the file, or not finite; the layout options (they name tensors in the
/// other formats).
pub fn import_onnx(path: &Path, opts: &ImportOptions) -> Result<Imported> {
    // Names in the file may hold any character: keep the message on one line.
    import_graph(path, opts).map_err(|e| anyhow!("{}", one_line(&format!("{e:#}"))))
}

/// `s` with control characters (newlines, ...) escaped.
fn one_line(s: &str) -> String {
    s.chars().map(|c| if c.is_control() { c.escape_default().to_string() } else { c.to_string() }).collect()
}

fn import_graph(path: &Path, opts: &ImportOptions) -> Result<Imported> {
    if opts.layout.is_some() || opts.prefix.is_some() || opts.head_prefix.is_some() {
        bail!(
            "the layout and prefix options name tensors in safetensors/npz files; an .onnx file's graph says \
             which tensors are the LSTM, so leave them out"
        );
    }
    let bytes = read_file(path)?;
    let model = ModelProto::decode(bytes.as_slice())
        .map_err(|e| anyhow!("not a valid ONNX file (corrupt or truncated protobuf): {e}"))?;
    let Some(graph) = model.graph.as_ref() else { bail!("not a valid ONNX file: it holds no graph") };
    let mut g = GraphReader::new(graph)?;
    g.run()?;
    let (model_data, mut notes) = g.finish()?;
    let opset = model
        .opset_import
        .iter()
        .find(|o| matches!(o.domain.as_deref(), None | Some("") | Some("ai.onnx")))
        .and_then(|o| o.version);
    let producer = format!(
        "{} {}",
        model.producer_name.as_deref().unwrap_or("unknown producer"),
        model.producer_version.as_deref().unwrap_or("")
    );
    notes.insert(
        0,
        format!(
            "written by {}, opset {}",
            producer.trim(),
            opset.map_or_else(|| "not declared".to_string(), |v| v.to_string())
        ),
    );
    model_data.check_finite().context("after import")?;
    model_data.view().context("the imported shapes do not form a model")?;
    let ignored = g.unused_initializers();
    Ok(Imported { model: model_data, norm: None, layout: Layout::Onnx, ignored, container: Container::Onnx, notes })
}

fn read_file(path: &Path) -> Result<Vec<u8>> {
    let meta = match std::fs::metadata(path) {
        Ok(m) => m,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => bail!("file not found"),
        Err(e) => bail!("cannot read: {e}"),
    };
    if !meta.is_file() {
        bail!("not a file (an .onnx model is one file)");
    }
    let len = meta.len();
    if len == 0 {
        bail!("not a valid ONNX file: the file is empty");
    }
    if len > MAX_ONNX_BYTES {
        bail!("the file is {len} bytes, over the {MAX_ONNX_BYTES}-byte (1 GiB) limit for an .onnx model");
    }
    std::fs::read(path).context("cannot read")
}

// ---------------------------------------------------------------------------
// The graph walk

struct Lstm {
    name: String,
    layout: i64,
}

struct GraphReader<'g> {
    graph: &'g GraphProto,
    initializers: HashMap<&'g str, &'g TensorProto>,
    sparse: BTreeSet<&'g str>,
    used_initializers: BTreeSet<String>,
    values: HashMap<String, Value>,
    input_name: String,
    input_rank: usize,
    /// What each graph input axis turned out to be.
    binding: Vec<Option<Role>>,
    /// Data-path values already consumed by a data-path node: name -> node.
    consumed: HashMap<String, String>,
    next_id: usize,
    last_id: usize,
    layers: Vec<FloatLayerData>,
    lstms: Vec<Lstm>,
    head: Option<FloatHeadData>,
    head_desc: Option<String>,
    glue: BTreeMap<String, usize>,
    zero_states: usize,
}

/// `node `name` (Op)` for messages.
fn node_label(node: &NodeProto) -> String {
    let op = node.op_type.as_deref().unwrap_or("?");
    match node.name.as_deref() {
        Some(n) if !n.is_empty() => format!("node `{n}` ({op})"),
        _ => match node.output.first() {
            Some(o) => format!("the {op} node writing `{o}`"),
            None => format!("an unnamed {op} node"),
        },
    }
}

fn node_name(node: &NodeProto) -> String {
    node.name.clone().filter(|n| !n.is_empty()).unwrap_or_else(|| node.output.first().cloned().unwrap_or_default())
}

impl<'g> GraphReader<'g> {
    fn new(graph: &'g GraphProto) -> Result<GraphReader<'g>> {
        let mut initializers = HashMap::new();
        for t in &graph.initializer {
            let name = t.name.as_deref().unwrap_or("");
            if initializers.insert(name, t).is_some() {
                bail!("the graph has two initializers named `{name}`");
            }
        }
        let sparse =
            graph.sparse_initializer.iter().filter_map(|s| s.values.as_ref().and_then(|v| v.name.as_deref())).collect();
        let inputs: Vec<_> =
            graph.input.iter().filter(|i| !initializers.contains_key(i.name.as_deref().unwrap_or(""))).collect();
        let input = match inputs.as_slice() {
            [one] => *one,
            [] => bail!("the graph has no input (Lapwing's model takes one input sequence)"),
            many => bail!(
                "the graph has {} inputs ({}); Lapwing's model takes one input sequence, and initial states must \
                 be zero constants in the graph",
                many.len(),
                many.iter().map(|i| format!("`{}`", i.name.as_deref().unwrap_or(""))).collect::<Vec<_>>().join(", ")
            ),
        };
        let input_name = input.name.clone().unwrap_or_default();
        let tensor = input.r#type.as_ref().and_then(|t| t.tensor_type.as_ref());
        let Some(tensor) = tensor else {
            bail!("graph input `{input_name}` is not declared as a tensor");
        };
        if let Some(t) = tensor.elem_type {
            if t != DT_FLOAT {
                bail!("graph input `{input_name}` has element type {}; Lapwing runs float32 models", dtype_name(t));
            }
        }
        let Some(shape) = tensor.shape.as_ref() else {
            bail!("graph input `{input_name}` declares no shape; Lapwing needs its axes (time, batch, features)");
        };
        let axes: Vec<Axis> = shape
            .dim
            .iter()
            .enumerate()
            .map(|(i, d)| Axis::new(Role::Input(i), d.dim_value.and_then(|v| u64::try_from(v).ok()).filter(|v| *v > 0)))
            .collect();
        let input_rank = axes.len();
        let mut values = HashMap::new();
        values.insert(input_name.clone(), Value::Stream(Stream { axes, stage: Stage::Input, id: 0 }));
        Ok(GraphReader {
            graph,
            initializers,
            sparse,
            used_initializers: BTreeSet::new(),
            values,
            input_name,
            input_rank,
            binding: vec![None; input_rank],
            consumed: HashMap::new(),
            next_id: 1,
            last_id: 0,
            layers: Vec::new(),
            lstms: Vec::new(),
            head: None,
            head_desc: None,
            glue: BTreeMap::new(),
            zero_states: 0,
        })
    }

    fn unused_initializers(&self) -> Vec<String> {
        let mut v: Vec<String> =
            self.initializers.keys().filter(|n| !self.used_initializers.contains(**n)).map(|n| n.to_string()).collect();
        v.sort();
        v
    }

    /// The value called `name`, decoding an initializer on first use.
    fn lookup(&mut self, name: &str) -> Option<Value> {
        if let Some(v) = self.values.get(name) {
            return Some(v.clone());
        }
        if let Some(t) = self.initializers.get(name).copied() {
            self.used_initializers.insert(name.to_string());
            let v = decode_tensor(t).unwrap_or_else(|e| Value::Opaque(format!("initializer `{name}` {e:#}")));
            self.values.insert(name.to_string(), v.clone());
            return Some(v);
        }
        if self.sparse.contains(name) {
            return Some(Value::Opaque(format!("`{name}` is a sparse initializer; Lapwing reads dense tensors")));
        }
        None
    }

    fn resolve(&self, a: Axis) -> Axis {
        match a.role {
            Role::Input(i) => match self.binding.get(i).copied().flatten() {
                Some(r) => Axis { role: r, size: a.size },
                None => a,
            },
            _ => a,
        }
    }

    fn run(&mut self) -> Result<()> {
        let graph = self.graph;
        for node in &graph.node {
            let label = node_label(node);
            let mut inputs = Vec::with_capacity(node.input.len());
            for name in &node.input {
                if name.is_empty() {
                    inputs.push(None);
                    continue;
                }
                match self.lookup(name) {
                    Some(v) => inputs.push(Some(v)),
                    None => bail!(
                        "{label}: input `{name}` is not an initializer, a graph input or the output of an earlier \
                         node (the nodes must be in topological order)"
                    ),
                }
            }
            let on_path = inputs.iter().any(|v| matches!(v, Some(Value::Stream(_))));
            let std_domain = matches!(node.domain.as_deref(), None | Some("") | Some("ai.onnx"));
            let outputs = if on_path {
                if !std_domain {
                    bail!(
                        "{label} of domain `{}` is on the data path; Lapwing accepts only standard ONNX operators",
                        node.domain.as_deref().unwrap_or("")
                    );
                }
                self.data_path(node, &label, &inputs).with_context(|| label.clone())?
            } else {
                let v = if std_domain {
                    self.evaluate(node, &inputs)
                        .unwrap_or_else(|e| Value::Opaque(format!("{label} could not be evaluated: {e:#}")))
                } else {
                    Value::Opaque(format!("{label} is a custom operator"))
                };
                node.output.iter().map(|_| v.clone()).collect()
            };
            for (name, v) in node.output.iter().zip(outputs) {
                if !name.is_empty() {
                    self.values.insert(name.clone(), v);
                }
            }
        }
        Ok(())
    }

    /// Registers a data-path node consuming `name`; refuses a second one.
    fn consume(&mut self, node: &NodeProto, name: &str) -> Result<usize> {
        if let Some(other) = self.consumed.get(name) {
            bail!(
                "`{name}` is already used by {other}; Lapwing follows one chain of nodes from the input to the \
                 output, without branches"
            );
        }
        self.consumed.insert(name.to_string(), node_label(node));
        let id = self.next_id;
        self.next_id += 1;
        self.last_id = id;
        Ok(id)
    }

    fn count_glue(&mut self, op: &str) {
        *self.glue.entry(op.to_string()).or_insert(0) += 1;
    }

    /// Handles a node with a data-path input; returns its outputs' values.
    fn data_path(&mut self, node: &NodeProto, label: &str, inputs: &[Option<Value>]) -> Result<Vec<Value>> {
        let op = node.op_type.as_deref().unwrap_or("");
        let streams: Vec<usize> =
            inputs.iter().enumerate().filter(|(_, v)| matches!(v, Some(Value::Stream(_)))).map(|(i, _)| i).collect();
        if streams.len() > 1 {
            bail!("combines {} data-path values; Lapwing accepts one chain of nodes without branches", streams.len());
        }
        let at = streams.first().copied().unwrap_or(0);
        let Some(Some(Value::Stream(s))) = inputs.get(at) else { bail!("internal: no data-path input") };
        let s = s.clone();
        let in_name = node.input.get(at).cloned().unwrap_or_default();
        if op == "Shape" {
            // Reads sizes only: not a step of the chain.
            let dims: Vec<Dim> = s.axes.iter().map(|a| Dim::Axis(self.resolve(*a))).collect();
            let v = shape_slice(node, dims)?;
            return Ok(vec![v]);
        }
        let accepted = matches!(
            op,
            "LSTM" | "Gemm" | "MatMul" | "Add" | "Transpose" | "Squeeze" | "Unsqueeze" | "Reshape" | "Identity"
        );
        if !accepted {
            bail!(
                "not accepted on the data path from graph input `{}`: Lapwing takes LSTM nodes, a linear head \
                 (Gemm, or MatMul + Add) and glue that only changes the layout (Transpose, Squeeze, Unsqueeze, \
                 Reshape of size-1 axes, Identity)",
                self.input_name
            );
        }
        let first_only = matches!(op, "LSTM" | "Gemm" | "MatMul" | "Transpose" | "Squeeze" | "Unsqueeze" | "Reshape");
        if first_only && at != 0 {
            bail!("takes the data-path value `{in_name}` as its input {at}; Lapwing accepts it only as input 0");
        }
        let id = self.consume(node, &in_name)?;
        let input = |i: usize| inputs.get(i).cloned().flatten();
        let out = match op {
            "LSTM" => return self.lstm(node, label, &s, inputs, id),
            "Gemm" => self.gemm(node, &s, input(1), input(2), id)?,
            "MatMul" => self.matmul(node, &s, input(1), id)?,
            "Add" => {
                let other = 1 - at.min(1);
                self.add_bias(node, &s, input(other), node.input.get(other).map_or("", String::as_str), id)?
            }
            _ => {
                let axes = match op {
                    "Transpose" => {
                        let perm = attr_ints(node, "perm")?;
                        permute(&s.axes, perm.as_deref()).context("attribute `perm`")?
                    }
                    "Squeeze" => self.squeeze(node, &s, input(1))?,
                    "Unsqueeze" => {
                        let axes = axes_of(node, input(1), "Unsqueeze")?;
                        unsqueeze(&s.axes, &axes, |_| Axis::new(Role::Unit, Some(1)))?
                    }
                    "Reshape" => self.reshape(node, &s, input(1))?,
                    _ => s.axes.clone(),
                };
                self.count_glue(op);
                Stream { axes, stage: s.stage, id }
            }
        };
        let mut outs = vec![Value::Stream(out)];
        outs.extend(node.output.iter().skip(1).map(|o| {
            Value::Opaque(format!("`{o}` is a second output of a data-path node; Lapwing follows one chain"))
        }));
        Ok(outs)
    }

    fn squeeze(&self, node: &NodeProto, s: &Stream, axes_in: Option<Value>) -> Result<Vec<Axis>> {
        if axes_in.is_none() && attr(node, "axes").is_none() {
            bail!(
                "has no `axes`: it would drop every axis that happens to have size 1 at run time; Lapwing needs \
                 the axes named"
            );
        }
        let axes = axes_of(node, axes_in, "Squeeze")?;
        let rank = s.axes.len();
        let mut drop = BTreeSet::new();
        for a in axes {
            let i = norm_axis(a, rank)?;
            let Some(ax) = s.axes.get(i).map(|a| self.resolve(*a)) else { bail!("axis {a} out of range") };
            let removable = ax.size == Some(1) && !matches!(ax.role, Role::Time | Role::Feat);
            if !removable {
                bail!("drops axis {a} ({}), which is not a size-1 direction or batch axis", self.describe(ax));
            }
            drop.insert(i);
        }
        Ok(s.axes.iter().enumerate().filter(|(i, _)| !drop.contains(i)).map(|(_, a)| *a).collect())
    }

    fn reshape(&self, node: &NodeProto, s: &Stream, shape: Option<Value>) -> Result<Vec<Axis>> {
        let target = known_ints(shape, "the target shape (input 1)")?;
        let allowzero = attr_int(node, "allowzero")?.unwrap_or(0) != 0;
        let axes: Vec<(usize, Axis)> = s.axes.iter().map(|a| self.resolve(*a)).enumerate().collect();
        let unit_like = |a: &Axis| matches!(a.role, Role::Dir | Role::Unit);
        let batch_one = |a: &Axis| a.size == Some(1) && matches!(a.role, Role::Batch | Role::Input(_));
        let candidates: [Vec<(usize, Axis)>; 2] = [
            axes.iter().filter(|(_, a)| !unit_like(a)).copied().collect(),
            axes.iter().filter(|(_, a)| !unit_like(a) && !batch_one(a)).copied().collect(),
        ];
        'next: for keep in candidates {
            if keep.len() != target.len() {
                continue;
            }
            let mut out = Vec::with_capacity(keep.len());
            for (j, ((orig, a), t)) in keep.iter().zip(&target).enumerate() {
                let ok = match *t {
                    0 => !allowzero && *orig == j,
                    -1 => target.iter().filter(|v| **v == -1).count() == 1,
                    n if n > 0 => a.size.is_none_or(|sz| i64::try_from(sz).ok() == Some(n)),
                    _ => false,
                };
                if !ok {
                    continue 'next;
                }
                // Keep the original (maybe unbound) axis, with its size.
                let raw = s.axes.get(*orig).copied().unwrap_or(*a);
                out.push(raw);
            }
            return Ok(out);
        }
        let shown: Vec<String> = axes.iter().map(|(_, a)| self.describe(*a)).collect();
        bail!(
            "target shape {target:?} is not its input [{}] with size-1 direction or batch axes dropped; Lapwing \
             accepts a Reshape only as a layout change",
            shown.join(", ")
        )
    }

    fn describe(&self, a: Axis) -> String {
        let a = self.resolve(a);
        let what = match a.role {
            Role::Time => "time".to_string(),
            Role::Batch => "batch".to_string(),
            Role::Dir => "direction".to_string(),
            Role::Feat => "features".to_string(),
            Role::Unit => "inserted".to_string(),
            Role::Input(i) => format!("input axis {i}"),
        };
        match a.size {
            Some(n) => format!("{what} {n}"),
            None => what,
        }
    }

    fn lstm(
        &mut self,
        node: &NodeProto,
        label: &str,
        x: &Stream,
        inputs: &[Option<Value>],
        id: usize,
    ) -> Result<Vec<Value>> {
        if !matches!(x.stage, Stage::Input | Stage::Lstm) {
            bail!("follows the linear head; Lapwing's head comes after the last LSTM");
        }
        let a = LstmAttrs::read(node)?;
        if inputs.len() > 8 {
            bail!("has {} inputs; the LSTM operator has at most 8", inputs.len());
        }
        let name_of = |i: usize| node.input.get(i).cloned().unwrap_or_default();
        if inputs.get(4).is_some_and(|v| v.is_some()) {
            bail!("input `sequence_lens` (`{}`) is not supported: Lapwing runs every step of the sequence", name_of(4));
        }
        if inputs.get(7).is_some_and(|v| v.is_some()) {
            bail!("input `P` (peephole weights, `{}`) is not supported: Lapwing's LSTM has no peepholes", name_of(7));
        }
        // Weights.
        let (w_shape, w) = floats(inputs.get(1).cloned().flatten(), "input `W`", &name_of(1))?;
        let (r_shape, r) = floats(inputs.get(2).cloned().flatten(), "input `R`", &name_of(2))?;
        let [dirs, rows, xs] = w_shape.as_slice() else {
            bail!("input `W` (`{}`) has shape {w_shape:?}, expected [1, 4H, X]", name_of(1));
        };
        if *xs == 0 {
            bail!("input `W` (`{}`) has shape {w_shape:?}: no input features", name_of(1));
        }
        if *dirs != 1 {
            bail!("input `W` (`{}`) has {dirs} directions; Lapwing runs one forward direction", name_of(1));
        }
        let h = match a.hidden_size {
            Some(h) => h,
            None => r_shape.last().copied().unwrap_or(0),
        };
        if h == 0 || *rows != 4 * h {
            bail!("input `W` (`{}`) has shape {w_shape:?}, expected [1, 4H, X] with H = {h}", name_of(1));
        }
        if r_shape != [1, 4 * h, h] {
            bail!("input `R` (`{}`) has shape {r_shape:?}, expected [1, {}, {h}]", name_of(2), 4 * h);
        }
        let bias = match inputs.get(3).cloned().flatten() {
            None => None,
            some => {
                let (b_shape, b) = floats(some, "input `B`", &name_of(3))?;
                if b_shape != [1, 8 * h] {
                    bail!("input `B` (`{}`) has shape {b_shape:?}, expected [1, {}]", name_of(3), 8 * h);
                }
                Some(b)
            }
        };
        // Initial states.
        for (i, what) in [(5, "initial_h"), (6, "initial_c")] {
            if let Some(v) = inputs.get(i).cloned().flatten() {
                let label = format!("input `{what}` (`{}`)", name_of(i));
                prove_zero_state(v, a.layout, h).map_err(|e| anyhow!("{label} {e:#}"))?;
                self.zero_states += 1;
            }
        }
        // The input's axes: bind the graph input's axes on the first LSTM.
        let want =
            if a.layout == 0 { [Role::Time, Role::Batch, Role::Feat] } else { [Role::Batch, Role::Time, Role::Feat] };
        if x.axes.len() != 3 {
            let shown: Vec<String> = x.axes.iter().map(|a| self.describe(*a)).collect();
            bail!("input `X` has {} axes [{}]; the LSTM operator takes 3", x.axes.len(), shown.join(", "));
        }
        for (ax, role) in x.axes.iter().zip(want) {
            if let Role::Input(i) = ax.role {
                if let Some(slot) = self.binding.get_mut(i) {
                    if slot.is_none() {
                        *slot = Some(role);
                    }
                }
            }
        }
        let mut batch_axis = None;
        for (ax, role) in x.axes.iter().zip(want) {
            let got = self.resolve(*ax);
            let ok = match role {
                Role::Batch => {
                    got.role == Role::Batch || (got.size == Some(1) && matches!(got.role, Role::Unit | Role::Dir))
                }
                other => got.role == other,
            };
            if !ok {
                bail!(
                    "with layout {} reads axis {} of `X` as {}, but that axis is the {}",
                    a.layout,
                    want.iter().position(|r| *r == role).unwrap_or(0),
                    match role {
                        Role::Time => "time axis",
                        Role::Batch => "batch axis",
                        _ => "feature axis",
                    },
                    self.describe(*ax)
                );
            }
            if role == Role::Batch {
                batch_axis = Some(*ax);
            }
        }
        let time = x.axes.iter().zip(want).find(|(_, r)| *r == Role::Time).map(|(a, _)| *a);
        let feat = x.axes.iter().zip(want).find(|(_, r)| *r == Role::Feat).map(|(a, _)| self.resolve(*a));
        let (Some(time), Some(batch), Some(feat)) = (time, batch_axis, feat) else { bail!("internal: axes") };
        if let Some(n) = feat.size {
            if usize::try_from(n).ok() != Some(*xs) {
                bail!("input `X` has {n} features but `W` (`{}`) takes {xs}", name_of(1));
            }
        }
        if let Some(prev) = self.layers.last() {
            if prev.hidden != *xs {
                bail!("takes {xs} inputs but the LSTM before it has {} hidden units", prev.hidden);
            }
        }
        self.layers.push(onnx_layer(&w, &r, bias.as_deref(), *xs, h)?);
        self.lstms.push(Lstm { name: node_name(node), layout: a.layout });
        let hs = Some(h as u64);
        let dir = Axis::new(Role::Dir, Some(1));
        let feat_out = Axis::new(Role::Feat, hs);
        let axes = if a.layout == 0 { vec![time, dir, batch, feat_out] } else { vec![batch, time, dir, feat_out] };
        let mut outs = Vec::new();
        match node.output.first() {
            Some(y) if !y.is_empty() => outs.push(Value::Stream(Stream { axes, stage: Stage::Lstm, id })),
            _ => bail!("has no output `Y`; Lapwing passes on the LSTM's per-step output Y"),
        }
        for (i, what) in [(1, "Y_h"), (2, "Y_c")] {
            if node.output.get(i).is_some() {
                outs.push(Value::Opaque(format!(
                    "output `{what}` of {label} (the last step's state) is used; Lapwing runs one step at a time \
                     and passes on only the per-step output Y"
                )));
            }
        }
        Ok(outs)
    }

    fn start_head(&self, s: &Stream) -> Result<()> {
        match s.stage {
            Stage::Lstm => Ok(()),
            Stage::Input => bail!("comes before any LSTM; Lapwing's linear head comes after the last LSTM"),
            Stage::HeadMatMul | Stage::Head => bail!("would be a second linear head; Lapwing's model has one"),
        }
    }

    fn gemm(&mut self, node: &NodeProto, s: &Stream, b: Option<Value>, c: Option<Value>, id: usize) -> Result<Stream> {
        self.start_head(s)?;
        for a in &node.attribute {
            match a.name.as_deref().unwrap_or("") {
                "alpha" | "beta" | "transA" | "transB" => {}
                other => bail!("attribute `{other}` is not supported"),
            }
        }
        if attr_int(node, "transA")?.unwrap_or(0) != 0 {
            bail!("attribute `transA` = 1 is not supported: the data-path input must be [time, features]");
        }
        let trans_b = attr_int(node, "transB")?.unwrap_or(0) != 0;
        let alpha = attr_float(node, "alpha")?.unwrap_or(1.0);
        let beta = attr_float(node, "beta")?.unwrap_or(1.0);
        let roles: Vec<Role> = s.axes.iter().map(|a| self.resolve(*a).role).collect();
        if roles != [Role::Time, Role::Feat] {
            let shown: Vec<String> = s.axes.iter().map(|a| self.describe(*a)).collect();
            bail!("its data-path input has axes [{}]; Lapwing's Gemm head takes [time, features]", shown.join(", "));
        }
        let h = self.last_hidden()?;
        let b_name = node.input.get(1).cloned().unwrap_or_default();
        let (shape, data) = floats(b, "input `B`", &b_name)?;
        let (y, w) = match (shape.as_slice(), trans_b) {
            ([rows, cols], true) if *cols == h => (*rows, data),
            ([rows, cols], false) if *rows == h => (*cols, transpose2(&data, *rows, *cols)),
            _ => bail!(
                "input `B` (`{b_name}`) has shape {shape:?}; with transB = {} it must be {} for H = {h}",
                u8::from(trans_b),
                if trans_b { "[Y, H]" } else { "[H, Y]" }
            ),
        };
        let w: Vec<f32> = w.iter().map(|v| v * alpha).collect();
        let bias = match c {
            None => vec![0.0; y],
            some => {
                let c_name = node.input.get(2).cloned().unwrap_or_default();
                let (cs, cd) = floats(some, "input `C`", &c_name)?;
                bias_vector(&cs, &cd, y).with_context(|| format!("input `C` (`{c_name}`)"))?
            }
        };
        let bias: Vec<f32> = bias.iter().map(|v| v * beta).collect();
        self.head = Some(FloatHeadData { input: h, output: y, w, b: bias });
        self.head_desc = Some(format!("Gemm `{}`", node_name(node)));
        let time = s.axes.first().copied().unwrap_or(Axis::new(Role::Time, None));
        Ok(Stream { axes: vec![time, Axis::new(Role::Feat, Some(y as u64))], stage: Stage::Head, id })
    }

    fn matmul(&mut self, node: &NodeProto, s: &Stream, b: Option<Value>, id: usize) -> Result<Stream> {
        self.start_head(s)?;
        let h = self.last_hidden()?;
        if s.axes.last().map(|a| self.resolve(*a).role) != Some(Role::Feat) {
            bail!("its data-path input's last axis is not the features; Lapwing's MatMul head multiplies features");
        }
        let b_name = node.input.get(1).cloned().unwrap_or_default();
        let (shape, data) = floats(b, "input 1", &b_name)?;
        let [rows, y] = shape.as_slice() else {
            bail!("input 1 (`{b_name}`) has shape {shape:?}; Lapwing's MatMul head takes a constant [H, Y] matrix");
        };
        if *rows != h {
            bail!("input 1 (`{b_name}`) has shape {shape:?}; it must be [{h}, Y] (H = {h})");
        }
        self.head = Some(FloatHeadData { input: h, output: *y, w: transpose2(&data, *rows, *y), b: vec![0.0; *y] });
        self.head_desc = Some(format!("MatMul `{}`", node_name(node)));
        let mut axes = s.axes.clone();
        if let Some(last) = axes.last_mut() {
            *last = Axis::new(Role::Feat, Some(*y as u64));
        }
        Ok(Stream { axes, stage: Stage::HeadMatMul, id })
    }

    fn add_bias(
        &mut self,
        node: &NodeProto,
        s: &Stream,
        other: Option<Value>,
        other_name: &str,
        id: usize,
    ) -> Result<Stream> {
        if s.stage != Stage::HeadMatMul {
            bail!("adds to the data path; Lapwing accepts an Add only as the bias right after a MatMul head");
        }
        let Some(head) = self.head.as_mut() else { bail!("internal: no head") };
        let (shape, data) = floats(other, "the bias", other_name)?;
        if shape.len() > s.axes.len() {
            bail!("the bias `{other_name}` has shape {shape:?}, more axes than the data-path value");
        }
        head.b = bias_vector(&shape, &data, head.output).with_context(|| format!("the bias `{other_name}`"))?;
        if let Some(d) = self.head_desc.as_mut() {
            d.push_str(&format!(" + Add `{}`", node_name(node)));
        }
        Ok(Stream { axes: s.axes.clone(), stage: Stage::Head, id })
    }

    fn last_hidden(&self) -> Result<usize> {
        self.layers.last().map(|l| l.hidden).ok_or_else(|| anyhow!("comes before any LSTM"))
    }

    /// Checks the graph output is the end of the chain and builds the model.
    fn finish(&mut self) -> Result<(FloatModelData, Vec<String>)> {
        if self.layers.is_empty() {
            bail!("no LSTM node takes graph input `{}` (through layout glue only)", self.input_name);
        }
        let outputs = &self.graph.output;
        let out_name = match outputs.as_slice() {
            [one] => one.name.clone().unwrap_or_default(),
            [] => bail!("the graph has no output"),
            many => bail!(
                "the graph has {} outputs ({}); Lapwing's model has one output, the per-step result",
                many.len(),
                many.iter().map(|o| format!("`{}`", o.name.as_deref().unwrap_or(""))).collect::<Vec<_>>().join(", ")
            ),
        };
        let stream = match self.values.get(&out_name) {
            Some(Value::Stream(s)) => s.clone(),
            Some(Value::Opaque(why)) => bail!("graph output `{out_name}`: {why}"),
            Some(other) => bail!("graph output `{out_name}` is {}, not computed from the input", other.kind()),
            None => bail!("graph output `{out_name}` is not computed by any node"),
        };
        if stream.id != self.last_id {
            let after = self.consumed.iter().find(|(name, _)| **name == out_name).map(|(_, n)| n.clone());
            bail!(
                "graph output `{out_name}` is not the end of the chain: {} continues from it",
                after.unwrap_or_else(|| "another node".to_string())
            );
        }
        let roles: Vec<Axis> = stream.axes.iter().map(|a| self.resolve(*a)).collect();
        let times = roles.iter().filter(|a| a.role == Role::Time).count();
        let feats = roles.iter().filter(|a| a.role == Role::Feat).count();
        if times != 1
            || feats != 1
            || roles.iter().any(|a| a.size != Some(1) && !matches!(a.role, Role::Time | Role::Feat | Role::Batch))
        {
            let shown: Vec<String> = stream.axes.iter().map(|a| self.describe(*a)).collect();
            bail!(
                "graph output `{out_name}` has axes [{}]; expected time and features (and size-1 axes)",
                shown.join(", ")
            );
        }
        let mut notes = Vec::new();
        let in_axes: Vec<String> = (0..self.input_rank)
            .map(|i| match self.binding.get(i).copied().flatten() {
                Some(Role::Time) => "time".to_string(),
                Some(Role::Batch) => "batch".to_string(),
                Some(Role::Feat) => "features".to_string(),
                _ => "size 1".to_string(),
            })
            .collect();
        let out_axes: Vec<String> = stream.axes.iter().map(|a| self.describe(*a)).collect();
        notes.push(format!(
            "input `{}` [{}] -> output `{out_name}` [{}]",
            self.input_name,
            in_axes.join(", "),
            out_axes.join(", ")
        ));
        let lstms: Vec<String> = self.lstms.iter().map(|l| format!("`{}` (layout {})", l.name, l.layout)).collect();
        notes.push(format!("LSTM nodes {}", lstms.join(", ")));
        notes.push(match &self.head_desc {
            Some(d) => format!("head {d}"),
            None => "no head".to_string(),
        });
        if self.zero_states > 0 {
            notes.push(format!(
                "{} initial state{} proven zero",
                self.zero_states,
                if self.zero_states == 1 { "" } else { "s" }
            ));
        }
        if !self.glue.is_empty() {
            let g: Vec<String> = self.glue.iter().map(|(op, n)| format!("{n} {op}")).collect();
            notes.push(format!("layout glue: {}", g.join(", ")));
        }
        Ok((FloatModelData { layers: std::mem::take(&mut self.layers), head: self.head.take() }, notes))
    }

    // -----------------------------------------------------------------------
    // Constant evaluation (no data-path input)

    fn evaluate(&self, node: &NodeProto, inputs: &[Option<Value>]) -> Result<Value> {
        let op = node.op_type.as_deref().unwrap_or("");
        let input = |i: usize| inputs.get(i).cloned().flatten();
        let need = |i: usize| input(i).ok_or_else(|| anyhow!("input {i} is missing"));
        if let Some(Value::Opaque(why)) = inputs.iter().flatten().find(|v| matches!(v, Value::Opaque(_))) {
            // Pass the first reason on, so an error at the use names the root.
            return Err(anyhow!("{why}"));
        }
        match op {
            "Constant" => constant(node),
            "Identity" => need(0),
            "Shape" => {
                let v = need(0)?;
                let dims = v.dims().ok_or_else(|| anyhow!("shape unknown"))?;
                shape_slice(node, dims)
            }
            "Gather" => gather(node, need(0)?, need(1)?),
            "Unsqueeze" => {
                let axes = axes_of(node, input(1), "Unsqueeze")?;
                reshape_value(need(0)?, |dims| unsqueeze(dims, &axes, |_| Dim::Known(1)))
            }
            "Squeeze" => {
                let axes = axes_of(node, input(1), "Squeeze")?;
                reshape_value(need(0)?, |dims| {
                    let rank = dims.len();
                    let drop: BTreeSet<usize> = axes.iter().map(|a| norm_axis(*a, rank)).collect::<Result<_>>()?;
                    Ok(dims.iter().enumerate().filter(|(i, _)| !drop.contains(i)).map(|(_, d)| *d).collect())
                })
            }
            "Concat" => concat(node, inputs),
            "Cast" => cast(node, need(0)?),
            "ConstantOfShape" => constant_of_shape(node, need(0)?),
            "Expand" => expand(need(0)?, need(1)?),
            "Slice" => slice(need(0)?, inputs),
            "Reshape" => {
                let target = known_ints(input(1), "the target shape")?;
                reshape_value(need(0)?, |dims| reshape_dims(dims, &target))
            }
            other => bail!("operator {other} is not one Lapwing evaluates"),
        }
    }
}

// ---------------------------------------------------------------------------
// LSTM attributes and weights

struct LstmAttrs {
    hidden_size: Option<usize>,
    layout: i64,
}

impl LstmAttrs {
    fn read(node: &NodeProto) -> Result<LstmAttrs> {
        let mut out = LstmAttrs { hidden_size: None, layout: 0 };
        for a in &node.attribute {
            let name = a.name.as_deref().unwrap_or("");
            match name {
                "hidden_size" => {
                    let v = want_int(a)?;
                    out.hidden_size = Some(
                        usize::try_from(v)
                            .ok()
                            .filter(|h| *h > 0 && *h <= MAX_TENSOR_ELEMENTS)
                            .ok_or_else(|| anyhow!("attribute `hidden_size` = {v} is not a positive size"))?,
                    );
                }
                "direction" => {
                    let v = want_string(a)?;
                    if v != "forward" {
                        bail!("attribute `direction` = \"{v}\" is not supported: Lapwing runs one forward direction");
                    }
                }
                "layout" => {
                    let v = want_int(a)?;
                    if v != 0 && v != 1 {
                        bail!("attribute `layout` = {v} is not supported: expected 0 or 1");
                    }
                    out.layout = v;
                }
                "input_forget" => {
                    let v = want_int(a)?;
                    if v != 0 {
                        bail!("attribute `input_forget` = {v} is not supported: Lapwing's input and forget gates are independent");
                    }
                }
                "clip" => bail!(
                    "attribute `clip` is not supported: Lapwing does not clip the gate inputs (remove it if the \
                     model never reaches it)"
                ),
                "activations" => {
                    let got = want_strings(a)?;
                    let standard = ["Sigmoid", "Tanh", "Tanh"];
                    if got.len() != 3 || got.iter().zip(standard).any(|(g, s)| !g.eq_ignore_ascii_case(s)) {
                        bail!(
                            "attribute `activations` = {got:?} is not supported: Lapwing computes Sigmoid, Tanh, Tanh"
                        );
                    }
                }
                "activation_alpha" | "activation_beta" => {
                    bail!("attribute `{name}` is not supported: Lapwing's activations take no parameters")
                }
                other => bail!("attribute `{other}` is not a standard LSTM attribute Lapwing supports"),
            }
        }
        Ok(out)
    }
}

/// Maps ONNX's `i, o, f, c` row blocks to Lapwing's `i, f, g, o` and sums the
/// two biases in f32.
fn onnx_layer(w: &[f32], r: &[f32], b: Option<&[f32]>, x: usize, h: usize) -> Result<FloatLayerData> {
    // Lapwing block k takes ONNX block ORDER[k].
    const ORDER: [usize; 4] = [0, 2, 3, 1];
    let reorder = |t: &[f32], cols: usize| -> Result<Vec<f32>> {
        let blocks: Vec<&[f32]> = t.chunks_exact(h * cols).collect();
        let mut out = Vec::with_capacity(t.len());
        for g in ORDER {
            out.extend_from_slice(blocks.get(g).ok_or_else(|| anyhow!("weights shorter than 4H rows"))?);
        }
        Ok(out)
    };
    let w_x = reorder(w, x)?;
    let w_h = reorder(r, h)?;
    let bias = match b {
        Some(b) => {
            let (wb, rb) = b.split_at_checked(4 * h).ok_or_else(|| anyhow!("bias shorter than 8H values"))?;
            let sum: Vec<f32> = wb.iter().zip(rb).map(|(a, c)| a + c).collect();
            reorder(&sum, 1)?
        }
        None => vec![0.0; 4 * h],
    };
    Ok(FloatLayerData { input: x, hidden: h, w_x, w_h, b: bias })
}

/// Checks an initial state is all zeros of shape `[1, batch, H]`
/// (layout 0) or `[batch, 1, H]` (layout 1).
fn prove_zero_state(v: Value, layout: i64, h: usize) -> Result<()> {
    let dims = match &v {
        Value::Floats { data, shape } => {
            if let Some(i) = data.iter().position(|x| *x != 0.0) {
                bail!(
                    "is not zero: element {i} is {}; Lapwing starts from a zero state",
                    data.get(i).copied().unwrap_or(0.0)
                );
            }
            shape.iter().map(|d| Dim::Known(*d as i64)).collect::<Vec<_>>()
        }
        Value::Zeros { dims } => dims.clone(),
        Value::Stream(_) => bail!("is computed from the graph input; Lapwing starts from a zero state"),
        Value::Ints { .. } => bail!("is an integer tensor"),
        Value::Opaque(why) => bail!("is not proven zero, because {why}"),
    };
    let dir_at = if layout == 0 { 0 } else { 1 };
    let shape_ok = dims.len() == 3
        && dims.get(dir_at).and_then(|d| d.value()).is_none_or(|v| v == 1)
        && dims.get(2).and_then(|d| d.value()).is_none_or(|v| usize::try_from(v).ok() == Some(h));
    if !shape_ok {
        bail!(
            "has shape {}, expected {}",
            shape_text(&dims),
            if layout == 0 { format!("[1, batch, {h}]") } else { format!("[batch, 1, {h}]") }
        );
    }
    Ok(())
}

/// A float constant's shape and values, checked finite, for `what`.
fn floats(v: Option<Value>, what: &str, name: &str) -> Result<(Vec<usize>, Vec<f32>)> {
    match v {
        Some(Value::Floats { shape, data }) => {
            if let Some(i) = data.iter().position(|x| !x.is_finite()) {
                bail!(
                    "{what} (`{name}`): `{name}`[{i}] is {} (weights must be finite)",
                    data.get(i).copied().unwrap_or(f32::NAN)
                );
            }
            Ok((shape, data))
        }
        Some(Value::Zeros { dims }) => {
            let shape: Vec<usize> = dims
                .iter()
                .map(|d| d.value().and_then(|v| usize::try_from(v).ok()))
                .collect::<Option<_>>()
                .ok_or_else(|| anyhow!("{what} (`{name}`) is a zero tensor of unknown shape"))?;
            let n = checked_len(&shape).with_context(|| format!("{what} (`{name}`)"))?;
            Ok((shape, vec![0.0; n]))
        }
        Some(Value::Opaque(why)) => bail!("{what} (`{name}`) is not a constant Lapwing can read: {why}"),
        Some(other) => bail!("{what} (`{name}`) is {}, expected a float constant", other.kind()),
        None => bail!("{what} is missing"),
    }
}

/// A `[Y]` bias from a constant broadcast along the last axis.
fn bias_vector(shape: &[usize], data: &[f32], y: usize) -> Result<Vec<f32>> {
    if data.len() == 1 {
        return Ok(vec![data.first().copied().unwrap_or(0.0); y]);
    }
    let leading_ones = shape.split_last().is_some_and(|(last, rest)| *last == y && rest.iter().all(|d| *d == 1));
    if !leading_ones || data.len() != y {
        bail!("has shape {shape:?}; a head bias must be [{y}] (or size-1 axes before it)");
    }
    Ok(data.to_vec())
}

fn transpose2(data: &[f32], rows: usize, cols: usize) -> Vec<f32> {
    let mut out = vec![0.0; data.len()];
    for (i, row) in data.chunks_exact(cols.max(1)).enumerate().take(rows) {
        for (j, v) in row.iter().enumerate() {
            if let Some(o) = out.get_mut(j * rows + i) {
                *o = *v;
            }
        }
    }
    out
}

// ---------------------------------------------------------------------------
// Attributes

fn attr<'n>(node: &'n NodeProto, name: &str) -> Option<&'n AttributeProto> {
    node.attribute.iter().find(|a| a.name.as_deref() == Some(name))
}

fn check_type(a: &AttributeProto, want: i32, what: &str) -> Result<()> {
    match a.r#type {
        Some(t) if t != want => bail!("attribute `{}` is not {what} (type {t})", a.name.as_deref().unwrap_or("")),
        _ => Ok(()),
    }
}

fn want_int(a: &AttributeProto) -> Result<i64> {
    check_type(a, AT_INT, "an integer")?;
    a.i.ok_or_else(|| anyhow!("attribute `{}` has no integer value", a.name.as_deref().unwrap_or("")))
}

fn want_string(a: &AttributeProto) -> Result<String> {
    check_type(a, AT_STRING, "a string")?;
    Ok(String::from_utf8_lossy(a.s.as_deref().unwrap_or_default()).into_owned())
}

fn want_strings(a: &AttributeProto) -> Result<Vec<String>> {
    check_type(a, AT_STRINGS, "a list of strings")?;
    Ok(a.strings.iter().map(|s| String::from_utf8_lossy(s).into_owned()).collect())
}

fn attr_int(node: &NodeProto, name: &str) -> Result<Option<i64>> {
    attr(node, name).map(want_int).transpose()
}

fn attr_float(node: &NodeProto, name: &str) -> Result<Option<f32>> {
    attr(node, name)
        .map(|a| {
            check_type(a, AT_FLOAT, "a float")?;
            a.f.ok_or_else(|| anyhow!("attribute `{name}` has no float value"))
        })
        .transpose()
}

fn attr_ints(node: &NodeProto, name: &str) -> Result<Option<Vec<i64>>> {
    attr(node, name)
        .map(|a| {
            check_type(a, AT_INTS, "a list of integers")?;
            Ok(a.ints.clone())
        })
        .transpose()
}

/// `axes` of Squeeze/Unsqueeze: the attribute (opset < 13) or input 1.
fn axes_of(node: &NodeProto, input: Option<Value>, op: &str) -> Result<Vec<i64>> {
    if let Some(a) = attr_ints(node, "axes")? {
        return Ok(a);
    }
    match input {
        Some(v) => known_ints(Some(v), "`axes` (input 1)"),
        None if op == "Squeeze" => bail!("has no `axes`"),
        None => bail!("has no `axes` (attribute or input 1)"),
    }
}

/// A constant integer tensor's values, all known.
fn known_ints(v: Option<Value>, what: &str) -> Result<Vec<i64>> {
    match v {
        Some(Value::Ints { data, .. }) => data
            .iter()
            .map(|d| match d {
                Dim::Known(v) => Ok(*v),
                _ => Err(anyhow!("{what} depends on the input's sizes; Lapwing needs it constant")),
            })
            .collect(),
        Some(Value::Opaque(why)) => bail!("{what} is not a constant: {why}"),
        Some(other) => bail!("{what} is {}, expected integer constants", other.kind()),
        None => bail!("{what} is missing"),
    }
}

fn norm_axis(a: i64, rank: usize) -> Result<usize> {
    let r = i64::try_from(rank).unwrap_or(i64::MAX);
    let i = if a < 0 { a + r } else { a };
    if !(0..r).contains(&i) {
        bail!("axis {a} is out of range for {rank} axes");
    }
    usize::try_from(i).map_err(|_| anyhow!("axis {a} is out of range"))
}

fn permute<T: Copy>(items: &[T], perm: Option<&[i64]>) -> Result<Vec<T>> {
    let rank = items.len();
    let perm: Vec<usize> = match perm {
        Some(p) => p.iter().map(|a| norm_axis(*a, rank)).collect::<Result<_>>()?,
        None => (0..rank).rev().collect(),
    };
    let distinct: BTreeSet<usize> = perm.iter().copied().collect();
    if perm.len() != rank || distinct.len() != rank {
        bail!("{perm:?} is not a permutation of {rank} axes");
    }
    perm.iter().map(|i| items.get(*i).copied().ok_or_else(|| anyhow!("axis {i} out of range"))).collect()
}

fn unsqueeze<T: Copy>(items: &[T], axes: &[i64], new: impl Fn(usize) -> T) -> Result<Vec<T>> {
    let out_rank = items.len() + axes.len();
    let at: BTreeSet<usize> = axes.iter().map(|a| norm_axis(*a, out_rank)).collect::<Result<_>>()?;
    if at.len() != axes.len() {
        bail!("`axes` {axes:?} repeats an axis");
    }
    let mut rest = items.iter();
    let mut out = Vec::with_capacity(out_rank);
    for i in 0..out_rank {
        if at.contains(&i) {
            out.push(new(i));
        } else {
            out.push(*rest.next().ok_or_else(|| anyhow!("`axes` {axes:?} out of range"))?);
        }
    }
    Ok(out)
}

// ---------------------------------------------------------------------------
// Tensors and constant operators

fn checked_len(shape: &[usize]) -> Result<usize> {
    let mut n: usize = 1;
    for d in shape {
        n = n.checked_mul(*d).filter(|n| *n <= MAX_TENSOR_ELEMENTS).ok_or_else(|| {
            anyhow!("shape {shape:?} is more than {MAX_TENSOR_ELEMENTS} (2^26) elements, the limit for one tensor")
        })?;
    }
    Ok(n)
}

/// Decodes an initializer or constant into a value, checking its size first.
fn decode_tensor(t: &TensorProto) -> Result<Value> {
    if t.data_location == Some(1) || !t.external_data.is_empty() {
        bail!("keeps its data in an external file; Lapwing reads self-contained .onnx files");
    }
    let mut shape = Vec::with_capacity(t.dims.len());
    for d in &t.dims {
        match usize::try_from(*d) {
            Ok(v) => shape.push(v),
            Err(_) => bail!("has a negative dimension in {:?}", t.dims),
        }
    }
    let n = checked_len(&shape).map_err(|_| {
        anyhow!("has shape {:?}, more than {MAX_TENSOR_ELEMENTS} (2^26) elements, the limit for one tensor", t.dims)
    })?;
    let dtype = t.data_type.unwrap_or(0);
    let raw = t.raw_data.as_deref().filter(|r| !r.is_empty());
    let count_err = |got: usize| anyhow!("holds {got} values for shape {:?} ({n} expected; corrupt file)", t.dims);
    let raw_err = |got: usize, size: usize| {
        anyhow!("holds {got} bytes of data for shape {:?} ({} expected; corrupt file)", t.dims, n * size)
    };
    match dtype {
        DT_FLOAT | DT_DOUBLE => {
            let data: Vec<f32> = match (raw, dtype) {
                (Some(r), DT_FLOAT) => {
                    if r.len() != n * 4 {
                        return Err(raw_err(r.len(), 4));
                    }
                    r.chunks_exact(4).filter_map(|c| c.try_into().ok()).map(f32::from_le_bytes).collect()
                }
                (Some(r), _) => {
                    if r.len() != n * 8 {
                        return Err(raw_err(r.len(), 8));
                    }
                    r.chunks_exact(8)
                        .filter_map(|c| c.try_into().ok())
                        .map(f64::from_le_bytes)
                        .map(|v| v as f32)
                        .collect()
                }
                (None, DT_FLOAT) => t.float_data.clone(),
                (None, _) => t.double_data.iter().map(|v| *v as f32).collect(),
            };
            if data.len() != n {
                return Err(count_err(data.len()));
            }
            Ok(Value::Floats { shape, data })
        }
        DT_INT64 | DT_INT32 => {
            let data: Vec<i64> = match (raw, dtype) {
                (Some(r), DT_INT64) => {
                    if r.len() != n * 8 {
                        return Err(raw_err(r.len(), 8));
                    }
                    r.chunks_exact(8).filter_map(|c| c.try_into().ok()).map(i64::from_le_bytes).collect()
                }
                (Some(r), _) => {
                    if r.len() != n * 4 {
                        return Err(raw_err(r.len(), 4));
                    }
                    r.chunks_exact(4)
                        .filter_map(|c| c.try_into().ok())
                        .map(|b| i64::from(i32::from_le_bytes(b)))
                        .collect()
                }
                (None, DT_INT64) => t.int64_data.clone(),
                (None, _) => t.int32_data.iter().map(|v| i64::from(*v)).collect(),
            };
            if data.len() != n {
                return Err(count_err(data.len()));
            }
            Ok(Value::Ints { shape, data: data.into_iter().map(Dim::Known).collect() })
        }
        other => bail!("has data type {}; Lapwing reads FLOAT and DOUBLE weights", dtype_name(other)),
    }
}

fn constant(node: &NodeProto) -> Result<Value> {
    let [a] = node.attribute.as_slice() else { bail!("a Constant node must have exactly one attribute") };
    let name = a.name.as_deref().unwrap_or("");
    match name {
        "value" => {
            check_type(a, AT_TENSOR, "a tensor")?;
            decode_tensor(a.t.as_ref().ok_or_else(|| anyhow!("attribute `value` has no tensor"))?)
        }
        "value_float" => Ok(Value::Floats { shape: vec![], data: vec![a.f.unwrap_or(0.0)] }),
        "value_floats" => Ok(Value::Floats { shape: vec![a.floats.len()], data: a.floats.clone() }),
        "value_int" => Ok(Value::Ints { shape: vec![], data: vec![Dim::Known(a.i.unwrap_or(0))] }),
        "value_ints" => {
            Ok(Value::Ints { shape: vec![a.ints.len()], data: a.ints.iter().map(|v| Dim::Known(*v)).collect() })
        }
        other => bail!("Constant attribute `{other}` is not one Lapwing reads"),
    }
}

/// `Shape` with its optional `start`/`end` attributes.
fn shape_slice(node: &NodeProto, dims: Vec<Dim>) -> Result<Value> {
    let rank = i64::try_from(dims.len()).unwrap_or(i64::MAX);
    let clamp = |v: i64| -> usize { usize::try_from((if v < 0 { v + rank } else { v }).clamp(0, rank)).unwrap_or(0) };
    let start = clamp(attr_int(node, "start")?.unwrap_or(0));
    let end = clamp(attr_int(node, "end")?.unwrap_or(rank));
    let data: Vec<Dim> = dims.get(start..end.max(start)).unwrap_or(&[]).to_vec();
    Ok(Value::Ints { shape: vec![data.len()], data })
}

fn gather(node: &NodeProto, data: Value, indices: Value) -> Result<Value> {
    let axis = attr_int(node, "axis")?.unwrap_or(0);
    let Value::Ints { shape, data } = data else { bail!("gathers from {}, not a shape", data.kind()) };
    if shape.len() != 1 || (axis != 0 && axis != -1) {
        bail!("gathers from a {}-axis tensor; Lapwing evaluates Gather on 1-axis shapes only", shape.len());
    }
    let Value::Ints { shape: ishape, data: idx } = indices else { bail!("indices are {}", indices.kind()) };
    let len = i64::try_from(data.len()).unwrap_or(i64::MAX);
    let mut out = Vec::with_capacity(idx.len());
    for i in idx {
        let Dim::Known(i) = i else { bail!("indices are not constant") };
        let j = if i < 0 { i + len } else { i };
        let d = usize::try_from(j).ok().and_then(|j| data.get(j)).ok_or_else(|| anyhow!("index {i} out of range"))?;
        out.push(*d);
    }
    Ok(Value::Ints { shape: ishape, data: out })
}

/// Applies a shape change to a constant's dims (data unchanged).
fn reshape_value(v: Value, f: impl Fn(&[Dim]) -> Result<Vec<Dim>>) -> Result<Value> {
    let known = |dims: &[Dim]| -> Result<Vec<usize>> {
        dims.iter()
            .map(|d| d.value().and_then(|v| usize::try_from(v).ok()).ok_or_else(|| anyhow!("unknown size")))
            .collect()
    };
    match v {
        Value::Floats { shape, data } => {
            let dims: Vec<Dim> = shape.iter().map(|d| Dim::Known(*d as i64)).collect();
            let shape = known(&f(&dims)?)?;
            if checked_len(&shape)? != data.len() {
                bail!("new shape {shape:?} does not hold {} values", data.len());
            }
            Ok(Value::Floats { shape, data })
        }
        Value::Ints { shape, data } => {
            let dims: Vec<Dim> = shape.iter().map(|d| Dim::Known(*d as i64)).collect();
            let shape = known(&f(&dims)?)?;
            if checked_len(&shape)? != data.len() {
                bail!("new shape {shape:?} does not hold {} values", data.len());
            }
            Ok(Value::Ints { shape, data })
        }
        Value::Zeros { dims } => Ok(Value::Zeros { dims: f(&dims)? }),
        other => bail!("reshapes {}", other.kind()),
    }
}

/// Reshape's target with `0` (copy) and `-1` (inferred, left unknown).
fn reshape_dims(dims: &[Dim], target: &[i64]) -> Result<Vec<Dim>> {
    target
        .iter()
        .enumerate()
        .map(|(i, t)| match *t {
            0 => dims.get(i).copied().ok_or_else(|| anyhow!("0 at axis {i} copies a missing axis")),
            -1 => Ok(Dim::Unknown),
            n if n > 0 => Ok(Dim::Known(n)),
            n => bail!("size {n} in the target shape"),
        })
        .collect::<Result<Vec<Dim>>>()
        .map(|mut v| {
            // Fill a single -1 when everything else is known.
            let known: Option<i64> = dims.iter().map(|d| d.value()).product();
            let rest: Option<i64> = v.iter().filter(|d| **d != Dim::Unknown).map(|d| d.value()).product();
            if let (Some(k), Some(r)) = (known, rest) {
                if r > 0 && v.iter().filter(|d| **d == Dim::Unknown).count() == 1 {
                    if let Some(slot) = v.iter_mut().find(|d| **d == Dim::Unknown) {
                        *slot = Dim::Known(k / r);
                    }
                }
            }
            v
        })
}

fn concat(node: &NodeProto, inputs: &[Option<Value>]) -> Result<Value> {
    let axis = attr_int(node, "axis")?.unwrap_or(0);
    if axis != 0 && axis != -1 {
        bail!("concatenates along axis {axis}; Lapwing evaluates Concat of 1-axis shapes only");
    }
    let mut out = Vec::new();
    for v in inputs.iter().flatten() {
        match v {
            Value::Ints { shape, data } if shape.len() == 1 => out.extend_from_slice(data),
            other => bail!("concatenates {}; Lapwing evaluates Concat of 1-axis integer shapes only", other.kind()),
        }
    }
    Ok(Value::Ints { shape: vec![out.len()], data: out })
}

fn cast(node: &NodeProto, v: Value) -> Result<Value> {
    let to = attr_int(node, "to")?.ok_or_else(|| anyhow!("Cast has no `to`"))?;
    let to = i32::try_from(to).unwrap_or(-1);
    match (v, to) {
        (v @ Value::Ints { .. }, DT_INT64 | DT_INT32) => Ok(v),
        (v @ (Value::Floats { .. } | Value::Zeros { .. }), DT_FLOAT | DT_DOUBLE) => Ok(v),
        (Value::Ints { shape, data }, DT_FLOAT | DT_DOUBLE) => {
            let data: Option<Vec<f32>> = data.iter().map(|d| d.value().map(|v| v as f32)).collect();
            let data = data.ok_or_else(|| anyhow!("casts sizes that depend on the input"))?;
            Ok(Value::Floats { shape, data })
        }
        (v, t) => bail!("casts {} to {}", v.kind(), dtype_name(t)),
    }
}

fn constant_of_shape(node: &NodeProto, shape: Value) -> Result<Value> {
    let Value::Ints { shape: s, data } = shape else { bail!("its shape is {}", shape.kind()) };
    if s.len() != 1 {
        bail!("its shape input has {} axes, expected 1", s.len());
    }
    let fill = match attr(node, "value") {
        None => Value::Floats { shape: vec![1], data: vec![0.0] },
        Some(a) => {
            check_type(a, AT_TENSOR, "a tensor")?;
            decode_tensor(a.t.as_ref().ok_or_else(|| anyhow!("attribute `value` has no tensor"))?)?
        }
    };
    match fill {
        Value::Floats { data: v, .. } if v.iter().all(|x| *x == 0.0) => Ok(Value::Zeros { dims: data }),
        Value::Floats { data: v, .. } => bail!("fills with {:?}, not zero", v.first().copied().unwrap_or(0.0)),
        other => bail!("fills with {}", other.kind()),
    }
}

fn broadcast(a: &[Dim], b: &[Dim]) -> Vec<Dim> {
    let rank = a.len().max(b.len());
    let pad = |v: &[Dim]| -> Vec<Dim> {
        let mut out = vec![Dim::Known(1); rank - v.len()];
        out.extend_from_slice(v);
        out
    };
    pad(a)
        .into_iter()
        .zip(pad(b))
        .map(|(x, y)| match (x.value(), y.value()) {
            (Some(1), _) => y,
            (_, Some(1)) => x,
            (Some(_), _) => x,
            _ => y,
        })
        .collect()
}

fn expand(v: Value, shape: Value) -> Result<Value> {
    let Value::Ints { data: target, .. } = shape else { bail!("its shape is {}", shape.kind()) };
    let dims = match v {
        Value::Floats { shape, data } => {
            if data.iter().any(|x| *x != 0.0) {
                bail!("expands a non-zero constant");
            }
            shape.iter().map(|d| Dim::Known(*d as i64)).collect::<Vec<_>>()
        }
        Value::Zeros { dims } => dims,
        other => bail!("expands {}", other.kind()),
    };
    Ok(Value::Zeros { dims: broadcast(&dims, &target) })
}

fn slice(v: Value, inputs: &[Option<Value>]) -> Result<Value> {
    match v {
        Value::Zeros { dims } => Ok(Value::Zeros { dims: vec![Dim::Unknown; dims.len()] }),
        Value::Floats { shape, data } if data.iter().all(|x| *x == 0.0) => {
            Ok(Value::Zeros { dims: vec![Dim::Unknown; shape.len()] })
        }
        Value::Ints { shape, data } if shape.len() == 1 => {
            let get = |i: usize, what: &str| -> Result<Option<i64>> {
                match inputs.get(i).cloned().flatten() {
                    None => Ok(None),
                    v => known_ints(v, what).map(|v| v.first().copied()),
                }
            };
            let len = i64::try_from(data.len()).unwrap_or(i64::MAX);
            if get(4, "steps")?.is_some_and(|s| s != 1) || get(3, "axes")?.is_some_and(|a| a != 0 && a != -1) {
                bail!("slices with steps or axes Lapwing does not evaluate");
            }
            let clamp = |v: i64| (if v < 0 { v + len } else { v }).clamp(0, len);
            let start = clamp(get(1, "starts")?.unwrap_or(0));
            let end = clamp(get(2, "ends")?.unwrap_or(len)).max(start);
            let (s, e) = (usize::try_from(start).unwrap_or(0), usize::try_from(end).unwrap_or(0));
            let out = data.get(s..e).unwrap_or(&[]).to_vec();
            Ok(Value::Ints { shape: vec![out.len()], data: out })
        }
        other => bail!("slices {}", other.kind()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn gate_blocks_are_reordered_to_i_f_g_o() {
        // H = 1, X = 1: ONNX rows i, o, f, c hold 1, 2, 3, 4.
        let w = [1.0, 2.0, 3.0, 4.0];
        let r = [10.0, 20.0, 30.0, 40.0];
        let b = [1.0, 2.0, 3.0, 4.0, 0.5, 0.5, 0.5, 0.5];
        let l = onnx_layer(&w, &r, Some(&b), 1, 1).unwrap();
        assert_eq!(l.w_x, [1.0, 3.0, 4.0, 2.0]);
        assert_eq!(l.w_h, [10.0, 30.0, 40.0, 20.0]);
        assert_eq!(l.b, [1.5, 3.5, 4.5, 2.5]);
    }

    #[test]
    fn tensor_sizes_are_checked_before_allocating() {
        let t = TensorProto { dims: vec![1 << 20, 1 << 20], data_type: Some(DT_FLOAT), ..Default::default() };
        let e = decode_tensor(&t).unwrap_err().to_string();
        assert!(e.contains("2^26"), "{e}");
        let t = TensorProto { dims: vec![i64::MAX, 3], data_type: Some(DT_FLOAT), ..Default::default() };
        assert!(decode_tensor(&t).is_err());
        let t =
            TensorProto { dims: vec![2, 2], data_type: Some(DT_FLOAT), float_data: vec![1.0; 3], ..Default::default() };
        let e = decode_tensor(&t).unwrap_err().to_string();
        assert!(e.contains("3 values") && e.contains("4 expected"), "{e}");
    }

    #[test]
    fn unsqueeze_and_permute_follow_the_standard() {
        assert_eq!(unsqueeze(&[7, 8], &[0, -1], |_| 1).unwrap(), vec![1, 7, 8, 1]);
        assert_eq!(permute(&[1, 2, 3], None).unwrap(), vec![3, 2, 1]);
        assert_eq!(permute(&[1, 2, 3], Some(&[1, 0, 2])).unwrap(), vec![2, 1, 3]);
        assert!(permute(&[1, 2, 3], Some(&[0, 0, 2])).is_err());
    }
}
