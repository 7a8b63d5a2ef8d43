//! Float LSTM import: reads weights from a file and returns a validated
//! [`FloatModelData`] (DESIGN.md section 4).
//!
//! # Containers
//!
//! Chosen by the path: a `.safetensors` file, a NumPy `.npz` archive (members
//! stored as `np.savez` writes them, or deflated as `np.savez_compressed`
//! does; read by a small zip reader in this module), or a directory of `.npy`
//! files (tensor name = file name without `.npy`; other files are skipped).
//! A path ending in `.onnx` is an ONNX graph, read by [`crate::onnx`]
//! ([`Container::Onnx`], [`Layout::Onnx`]); the rest of this page is about
//! tensor files.
//! Tensors must be float32 or float64 (float64 is rounded to the nearest f32;
//! a finite value outside the f32 range is an error); `.npy` arrays may be
//! big-endian or Fortran-ordered. Any other dtype is an error naming the tensor
//! and its dtype, raised only for tensors the layout uses. Before its data is
//! read or decoded, a tensor with more than [`MAX_TENSOR_ELEMENTS`] (2^26)
//! elements is refused as a sanity limit.
//!
//! # Layouts
//!
//! Detected from the tensor names unless [`ImportOptions::layout`] forces one.
//! In every layout a layer has `4H` gate rows, stacked in the gate order below
//! and mapped to Lapwing's `i, f, g, o`; layer `k + 1` must take as many inputs
//! as layer `k` has hidden units; the head's input is the last layer's `H`.
//! `norm.mean` and `norm.std` (`[X]`, `std > 0`) are accepted in every layout
//! and returned as [`Imported::norm`] (not folded).
//!
//! - [`Layout::Lapwing`] (`lapwing`, gate order `i,f,g,o`): `layers.{k}.w_x`
//!   `[4H, X]`, `layers.{k}.w_h` `[4H, H]`, `layers.{k}.b` `[4H]`, optional
//!   `head.w` `[Y, H]` + `head.b` `[Y]`. Strict: any other tensor is an error,
//!   because this is our own format and a stray name is a mistake.
//! - [`Layout::Split`] (`split`, gate order `i,f,g,o`, as PyTorch `nn.LSTM`
//!   writes it): `<prefix>.weight_ih_l{k}` `[4H, X]`, `<prefix>.weight_hh_l{k}`
//!   `[4H, H]`, `<prefix>.bias_ih_l{k}` and `<prefix>.bias_hh_l{k}` `[4H]`
//!   (both or neither; summed in f32 into one bias, zero if absent); the prefix
//!   may be empty (bare `weight_ih_l0`). The head is `<head>.weight` `[Y, H]` +
//!   `<head>.bias` `[Y]`. The LSTM prefix is the one in front of
//!   `weight_ih_l<k>` and the head the only other `.weight`/`.bias` pair whose
//!   shapes fit; if there are several candidates the error lists them and
//!   asks for [`ImportOptions::prefix`] / [`ImportOptions::head_prefix`], which
//!   always win when given. Bidirectional (`*_reverse`) and projected
//!   (`weight_hr_l{k}`) LSTMs are refused.
//! - [`Layout::Fused`] (`fused`, gate order `i,f,c,o`, as Keras-style
//!   exports write it; `c` is the candidate, Lapwing's `g`, so the rows keep
//!   their order): per layer a group `<p>/kernel` `[X, 4H]`,
//!   `<p>/recurrent_kernel` `[H, 4H]`, `<p>/bias` `[4H]` (zero if absent);
//!   kernels are transposed to `[4H, X]` / `[4H, H]`. The separator may be `/`
//!   or `.` and a `:0` suffix is dropped. Layer groups (those with a
//!   `recurrent_kernel`) run in natural order of their names (`lstm`,
//!   `lstm_1`, `lstm_2`, ..., `lstm_10`). The head is the only other group with
//!   a `kernel` `[H, Y]` (transposed to `[Y, H]`) and a `bias` `[Y]`.
//!   [`ImportOptions::prefix`] keeps only the layer groups under that prefix;
//!   [`ImportOptions::head_prefix`] names the head group. Layer groups whose
//!   name contains `backward` or `reverse` (bidirectional wrappers) are refused.
//!
//! In the `split` and `fused` layouts, tensors the layout does not use (an
//! optimizer step, another module) are not an error: they are listed in
//! [`Imported::ignored`] and in the summary, so a caller can warn.
//!
//! # Errors
//!
//! Every error message starts with the path, then says what is wrong with
//! which tensor: missing file, unsupported path kind, corrupt container,
//! missing tensor (and the layout that expected it), wrong shape (expected vs
//! found dimensions), `4H` not divisible by 4, no or several matching layouts,
//! layers that do not chain, and NaN/infinity given as the file's own tensor
//! name and flat index, e.g. `rnn.weight_hh_l1[37] is NaN`.

use std::cmp::Ordering;
use std::collections::{BTreeMap, BTreeSet};
use std::fmt;
use std::fs::File;
use std::io::{Read, Seek, SeekFrom};
use std::path::Path;

use anyhow::{anyhow, bail, Context, Result};
use npyz::{DType, NpyFile, Order, TypeChar};
use safetensors::{Dtype, SafeTensorError, SafeTensors};

use crate::float_model::{FloatHeadData, FloatLayerData, FloatModelData};

/// Largest element count accepted for one tensor (2^26), checked before the
/// tensor's data is read or decoded.
pub const MAX_TENSOR_ELEMENTS: usize = 1 << 26;

/// Largest byte size of one tensor's stored form: 2^26 float64 values plus
/// room for an `.npy` header.
const MAX_TENSOR_BYTES: u64 = (MAX_TENSOR_ELEMENTS as u64) * 8 + (1 << 20);

/// Largest safetensors JSON header or zip central directory read.
const MAX_INDEX_BYTES: u64 = 64 << 20;

/// How many names an error message lists before "...".
const LIST_LIMIT: usize = 8;

/// A tensor naming scheme (see the module docs for each one's names and
/// shapes).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Layout {
    /// Lapwing's own names: `layers.{k}.w_x`, `layers.{k}.w_h`, `layers.{k}.b`,
    /// `head.w`, `head.b`; gate order `i,f,g,o`.
    Lapwing,
    /// Separate input and recurrent weights and biases,
    /// `<prefix>.weight_ih_l{k}` ...; gate order `i,f,g,o`.
    Split,
    /// `[X, 4H]` kernels per layer group, `<p>/kernel`,
    /// `<p>/recurrent_kernel`, `<p>/bias`; gate order `i,f,c,o`.
    Fused,
    /// An ONNX graph's `LSTM` nodes (`W`, `R`, `B`; gate order `i,o,f,c`),
    /// see [`crate::onnx`]. Not a tensor-naming scheme: never detected from
    /// names nor forced, so not in [`Layout::ALL`].
    Onnx,
}

impl Layout {
    /// Every tensor-naming layout, in the order detection reports them.
    pub const ALL: [Layout; 3] = [Layout::Lapwing, Layout::Split, Layout::Fused];

    /// The layout's name as the CLI spells it: `lapwing`, `split` or `fused`.
    pub fn name(self) -> &'static str {
        match self {
            Layout::Lapwing => "lapwing",
            Layout::Split => "split",
            Layout::Fused => "fused",
            Layout::Onnx => "onnx",
        }
    }

    /// The gate order of the source rows: `"i,f,g,o"` or `"i,f,c,o"` (the
    /// latter's `c` is the candidate gate, Lapwing's `g`).
    pub fn source_gate_order(self) -> &'static str {
        match self {
            Layout::Lapwing | Layout::Split => "i,f,g,o",
            Layout::Fused => "i,f,c,o",
            Layout::Onnx => "i,o,f,c",
        }
    }

    /// The layout called `name` (as [`Layout::name`] spells it, any case).
    pub fn from_name(name: &str) -> Option<Layout> {
        Layout::ALL.into_iter().find(|l| l.name().eq_ignore_ascii_case(name.trim()))
    }
}

impl fmt::Display for Layout {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl std::str::FromStr for Layout {
    type Err = anyhow::Error;

    /// Parses a layout name.
    ///
    /// # Errors
    /// An unknown name; the message lists the valid ones.
    fn from_str(s: &str) -> Result<Layout> {
        Layout::from_name(s).ok_or_else(|| anyhow!("unknown layout `{s}`: expected one of lapwing, split, fused"))
    }
}

/// What kind of file the weights came from.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Container {
    /// A `.safetensors` file.
    Safetensors,
    /// A NumPy `.npz` archive.
    Npz,
    /// A directory of `.npy` files.
    NpyDir,
    /// An `.onnx` file.
    Onnx,
}

impl Container {
    /// A short description for reports, e.g. `safetensors file`.
    pub fn describe(self) -> &'static str {
        match self {
            Container::Safetensors => "safetensors file",
            Container::Npz => "NumPy .npz archive",
            Container::NpyDir => "directory of .npy files",
            Container::Onnx => "ONNX file",
        }
    }
}

/// What the caller knows about the file; everything defaults to detection.
#[derive(Clone, Debug, Default)]
pub struct ImportOptions {
    /// Force a layout instead of detecting it.
    pub layout: Option<Layout>,
    /// Split layout: the LSTM's name prefix (`rnn` for `rnn.weight_ih_l0`;
    /// empty for bare names). Fused layout: keep only layer groups under this
    /// prefix. Ignored by the Lapwing layout.
    pub prefix: Option<String>,
    /// Split layout: the head's prefix (`proj` for `proj.weight`). Fused
    /// layout: the head's group (`dense`). Ignored by the Lapwing layout.
    pub head_prefix: Option<String>,
}

/// Input normalization found in the file, `x_n = (x - mean) / std`; not yet
/// folded (see [`FloatModelData::fold_normalization`]).
#[derive(Clone, Debug, PartialEq)]
pub struct Normalization {
    /// Per-feature mean, `[X]`, finite.
    pub mean: Vec<f32>,
    /// Per-feature standard deviation, `[X]`, finite and positive.
    pub std: Vec<f32>,
}

/// The result of [`import`].
#[derive(Clone, Debug)]
pub struct Imported {
    /// The weights in Lapwing's layout (gate order `i, f, g, o`, one folded
    /// bias per layer); finite, and shapes accepted by
    /// [`FloatModelData::view`].
    pub model: FloatModelData,
    /// `norm.mean` / `norm.std` when the file has them.
    pub norm: Option<Normalization>,
    /// The layout that was read (detected or forced).
    pub layout: Layout,
    /// Tensors in the file that the layout did not use, sorted (always empty
    /// for [`Layout::Lapwing`], which refuses unknown tensors).
    pub ignored: Vec<String>,
    /// The kind of file read.
    pub container: Container,
    /// What was found besides shapes, e.g. the prefixes used and biases that
    /// were folded or absent, one fact per entry.
    pub notes: Vec<String>,
}

impl Imported {
    /// A few human-readable lines: file kind, layout, source gate order,
    /// layer count, X, H per layer, Y or "no head", whether a normalization
    /// is present; then the notes and the ignored tensors, if any.
    pub fn summary(&self) -> String {
        let hs: Vec<String> = self.model.layers.iter().map(|l| l.hidden.to_string()).collect();
        let head = match &self.model.head {
            Some(h) => format!("head Y={}", h.output),
            None => "no head".to_string(),
        };
        let norm = if self.norm.is_some() { "normalization: yes" } else { "normalization: no" };
        let mut s = format!(
            "{}, layout {} (source gate order {} -> i,f,g,o): {} layer{}, X={}, H={}, {}, {}",
            self.container.describe(),
            self.layout.name(),
            self.layout.source_gate_order(),
            self.model.layers.len(),
            if self.model.layers.len() == 1 { "" } else { "s" },
            self.model.input_len(),
            hs.join(","),
            head,
            norm,
        );
        if !self.notes.is_empty() {
            s.push_str("\n  ");
            s.push_str(&self.notes.join("; "));
        }
        if !self.ignored.is_empty() {
            s.push_str(&format!(
                "\n  ignored {} tensor{} not used by the {} layout: {}",
                self.ignored.len(),
                if self.ignored.len() == 1 { "" } else { "s" },
                self.layout.name(),
                list_names(&self.ignored),
            ));
        }
        s
    }
}

/// Imports a float LSTM from `path` (a `.safetensors` file, a `.npz` archive,
/// a directory of `.npy` files, or an `.onnx` file read by
/// [`crate::onnx::import_onnx`]), detecting the layout unless `opts` forces
/// one.
///
/// The result has passed [`FloatModelData::check_finite`] and
/// [`FloatModelData::view`]; every weight is the source value (float64
/// sources rounded to nearest f32), except that split-layout biases are
/// `bias_ih + bias_hh` added in f32 and fused kernels are transposed.
///
/// # Errors
/// Every message starts with `path`. Missing or unreadable file, a path that
/// is not `.safetensors`/`.npz`/a directory, a corrupt container, a tensor
/// over [`MAX_TENSOR_ELEMENTS`], no tensors, no or several matching layouts,
/// a missing tensor, a wrong shape (expected vs found), `4H` not divisible by
/// 4, layers that do not chain, a used tensor that is not float32/float64, a
/// NaN or infinity (source tensor name and flat index), an ambiguous prefix,
/// bidirectional or projected LSTMs, and unknown tensors in the Lapwing
/// layout.
pub fn import(path: &Path, opts: &ImportOptions) -> Result<Imported> {
    import_inner(path, opts).map_err(|e| anyhow!("{}: {e:#}", path.display()))
}

fn import_inner(path: &Path, opts: &ImportOptions) -> Result<Imported> {
    if path.extension().and_then(|e| e.to_str()).is_some_and(|e| e.eq_ignore_ascii_case("onnx")) && !path.is_dir() {
        return crate::onnx::import_onnx(path, opts);
    }
    let store = load(path)?;
    if store.entries.is_empty() {
        bail!("the {} holds no tensors", store.container.describe());
    }
    let detected = detect(&store);
    let layout = match opts.layout {
        Some(l) => l,
        None => match detected.as_slice() {
            [one] => *one,
            [] => bail!(
                "no known layout matches: looked for lapwing (`layers.0.w_x`, `layers.0.w_h`, `layers.0.b`), \
                 split (`<prefix>.weight_ih_l0`, `<prefix>.weight_hh_l0`) and fused (`<group>/kernel`, \
                 `<group>/recurrent_kernel`); the file has {} tensor{}: {}",
                store.entries.len(),
                if store.entries.len() == 1 { "" } else { "s" },
                list_names(store.entries.keys())
            ),
            many => bail!(
                "the tensor names fit more than one layout ({}); choose one with the layout option",
                many.iter().map(|l| l.name()).collect::<Vec<_>>().join(", ")
            ),
        },
    };
    let mut b = Builder { store: &store, layout, used: BTreeSet::new(), notes: Vec::new() };
    let built = match layout {
        Layout::Lapwing => b.lapwing(),
        Layout::Split => b.split(opts),
        Layout::Fused => b.fused(opts),
        Layout::Onnx => bail!("the onnx layout is read from .onnx files only"),
    };
    let (model, norm) = match built {
        Ok(v) => v,
        Err(e) => {
            let others: Vec<&str> = detected.iter().filter(|l| **l != layout).map(|l| l.name()).collect();
            if opts.layout.is_some() && !detected.contains(&layout) && !others.is_empty() {
                bail!(
                    "layout {}: {e:#} (the layout was forced; the tensor names look like the {} layout)",
                    layout.name(),
                    others.join(" or ")
                );
            }
            bail!("layout {}: {e:#}", layout.name());
        }
    };
    model.check_finite().context("after import")?;
    model.view().context("the imported shapes do not form a model")?;
    let ignored: Vec<String> = store.entries.keys().filter(|n| !b.used.contains(*n)).cloned().collect();
    Ok(Imported { model, norm, layout, ignored, container: store.container, notes: b.notes })
}

// ---------------------------------------------------------------------------
// Tensors as stored

/// Element type as stored.
#[derive(Clone, Debug, PartialEq)]
enum SrcDtype {
    F32,
    F64,
    /// Anything else, as the container spells it.
    Other(String),
}

/// Where a tensor's values are.
#[derive(Clone, Debug)]
enum Payload {
    /// Little-endian, C-order values (safetensors); empty for other dtypes.
    LeBytes(Vec<u8>),
    /// A whole `.npy` file.
    Npy { bytes: Vec<u8>, fortran: bool },
}

#[derive(Clone, Debug)]
struct Entry {
    shape: Vec<usize>,
    dtype: SrcDtype,
    payload: Payload,
}

struct Store {
    container: Container,
    entries: BTreeMap<String, Entry>,
}

/// A decoded tensor: finite f32 values in C order.
struct Tensor {
    name: String,
    shape: Vec<usize>,
    data: Vec<f32>,
}

fn load(path: &Path) -> Result<Store> {
    let meta = match std::fs::metadata(path) {
        Ok(m) => m,
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => bail!("file not found"),
        Err(e) => bail!("cannot read: {e}"),
    };
    if meta.is_dir() {
        return load_npy_dir(path);
    }
    let ext = path.extension().and_then(|e| e.to_str()).map(str::to_ascii_lowercase).unwrap_or_default();
    match ext.as_str() {
        "safetensors" => load_safetensors(path),
        "npz" => load_npz(path),
        "npy" => bail!(
            "a single .npy file holds one tensor; put the model's .npy files in one directory and import the directory"
        ),
        _ => bail!(
            "unsupported file type{}: expected a .safetensors file, a .npz archive, a directory of .npy files or an \
             .onnx file",
            if ext.is_empty() { String::new() } else { format!(" `.{ext}`") }
        ),
    }
}

fn too_many_elements(name: &str, shape: &[u64]) -> anyhow::Error {
    anyhow!(
        "tensor `{name}` has shape {shape:?}, more than {MAX_TENSOR_ELEMENTS} (2^26) elements, the limit for one tensor"
    )
}

/// Element count of `shape`, refusing overflow and the sanity limit.
fn checked_elements(name: &str, shape: &[u64]) -> Result<usize> {
    let mut n: u64 = 1;
    for d in shape {
        n = n.checked_mul(*d).ok_or_else(|| too_many_elements(name, shape))?;
    }
    match usize::try_from(n) {
        Ok(n) if n <= MAX_TENSOR_ELEMENTS => Ok(n),
        _ => Err(too_many_elements(name, shape)),
    }
}

fn load_safetensors(path: &Path) -> Result<Store> {
    let mut f = File::open(path).context("cannot open")?;
    let len = f.metadata().context("cannot read")?.len();
    if len == 0 {
        bail!("not a valid safetensors file: the file is empty");
    }
    if len < 8 {
        bail!("not a valid safetensors file: {len} bytes is shorter than the 8-byte header length");
    }
    let mut n8 = [0u8; 8];
    f.read_exact(&mut n8).context("cannot read")?;
    let n = u64::from_le_bytes(n8);
    if n > MAX_INDEX_BYTES || n.saturating_add(8) > len {
        bail!("not a valid safetensors file (corrupt or truncated): header length {n} bytes, file length {len} bytes");
    }
    // Check shapes from the JSON header before reading the data.
    let mut header = vec![0u8; usize::try_from(n)?];
    f.read_exact(&mut header).context("cannot read")?;
    let json: serde_json::Value =
        serde_json::from_slice(&header).map_err(|e| anyhow!("not a valid safetensors file (corrupt header): {e}"))?;
    let obj = json.as_object().ok_or_else(|| anyhow!("not a valid safetensors file: header is not a JSON object"))?;
    let mut data_end = 0u64;
    for (name, info) in obj.iter().filter(|(k, _)| k.as_str() != "__metadata__") {
        if let Some(shape) = info.get("shape").and_then(|s| s.as_array()) {
            let dims: Vec<u64> = shape.iter().map(|d| d.as_u64().unwrap_or(u64::MAX)).collect();
            checked_elements(name, &dims)?;
        }
        if let Some(end) = info.get("data_offsets").and_then(|o| o.get(1)).and_then(|e| e.as_u64()) {
            data_end = data_end.max(end);
        }
    }
    // The file must be exactly header + data: refuse a mismatch before
    // reading (a huge or sparse file is never loaded).
    let expected = data_end.saturating_add(8).saturating_add(n);
    if expected != len {
        bail!(
            "not a valid safetensors file (corrupt or truncated, or padded): the header describes {expected} bytes, \
             the file has {len}"
        );
    }
    f.seek(SeekFrom::Start(0)).context("cannot read")?;
    let mut buf = Vec::with_capacity(usize::try_from(len)?);
    f.read_to_end(&mut buf).context("cannot read")?;
    let st = SafeTensors::deserialize(&buf).map_err(|e| {
        let why = match e {
            SafeTensorError::MetadataIncompleteBuffer => {
                "the data section is not the size the header declares".to_string()
            }
            SafeTensorError::InvalidOffset(name) => format!("tensor `{name}` has invalid data offsets"),
            SafeTensorError::TensorInvalidInfo => "a tensor's size does not match its shape and dtype".to_string(),
            other => format!("{other}"),
        };
        anyhow!("not a valid safetensors file (corrupt or truncated): {why}")
    })?;
    let mut entries = BTreeMap::new();
    for (name, view) in st.tensors() {
        let dtype = match view.dtype() {
            Dtype::F32 => SrcDtype::F32,
            Dtype::F64 => SrcDtype::F64,
            other => SrcDtype::Other(format!("{other:?}")),
        };
        let bytes = if matches!(dtype, SrcDtype::Other(_)) { Vec::new() } else { view.data().to_vec() };
        entries.insert(name, Entry { shape: view.shape().to_vec(), dtype, payload: Payload::LeBytes(bytes) });
    }
    Ok(Store { container: Container::Safetensors, entries })
}

fn load_npz(path: &Path) -> Result<Store> {
    let f = File::open(path).context("cannot open")?;
    let members = npz::read_members(f)?;
    let mut entries = BTreeMap::new();
    for (member, bytes) in members {
        let Some(name) = member.strip_suffix(".npy") else {
            bail!("archive member `{member}` is not a .npy array (a .npz holds only .npy members)");
        };
        let entry = parse_npy(name, bytes)?;
        if entries.insert(name.to_string(), entry).is_some() {
            bail!("archive holds tensor `{name}` twice");
        }
    }
    Ok(Store { container: Container::Npz, entries })
}

fn load_npy_dir(path: &Path) -> Result<Store> {
    let mut files = Vec::new();
    for item in std::fs::read_dir(path).context("cannot list directory")? {
        let item = item.context("cannot list directory")?;
        let p = item.path();
        if p.extension().and_then(|e| e.to_str()) == Some("npy") && p.is_file() {
            let Some(stem) = p.file_stem().and_then(|s| s.to_str()) else {
                bail!("file name {} is not valid UTF-8", p.display());
            };
            files.push((stem.to_string(), p));
        }
    }
    if files.is_empty() {
        bail!("the directory holds no .npy files");
    }
    files.sort();
    let mut entries = BTreeMap::new();
    for (name, p) in files {
        let len = std::fs::metadata(&p).with_context(|| format!("cannot read {}", p.display()))?.len();
        if len > MAX_TENSOR_BYTES {
            bail!("tensor `{name}` ({}) is {len} bytes, over the limit for one tensor (2^26 elements)", p.display());
        }
        let bytes = std::fs::read(&p).with_context(|| format!("cannot read {}", p.display()))?;
        entries.insert(name.clone(), parse_npy(&name, bytes)?);
    }
    Ok(Store { container: Container::NpyDir, entries })
}

/// Reads the shape out of an `.npy` header before `npyz` does, so a huge or
/// overflowing shape is refused with the tensor's name. Returns `Ok` when the
/// header cannot be read this way (then `npyz` reports it).
fn precheck_npy_shape(name: &str, bytes: &[u8]) -> Result<()> {
    let Some(major) = bytes.get(6) else { return Ok(()) };
    let (start, len): (usize, Option<usize>) = match major {
        1 => (10, bytes.get(8..10).and_then(|b| b.try_into().ok()).map(|b: [u8; 2]| u16::from_le_bytes(b) as usize)),
        _ => (12, bytes.get(8..12).and_then(|b| b.try_into().ok()).map(|b: [u8; 4]| u32::from_le_bytes(b) as usize)),
    };
    let Some(text) = len.and_then(|l| bytes.get(start..start.saturating_add(l))) else { return Ok(()) };
    let depth = crate::data::npy_header_depth(text);
    if depth > crate::data::MAX_NPY_HEADER_DEPTH {
        bail!("tensor `{name}`: not a valid .npy array: the header nests brackets {depth} deep");
    }
    let text = String::from_utf8_lossy(text);
    let Some(at) = text.find("'shape'").or_else(|| text.find("\"shape\"")) else { return Ok(()) };
    let rest = text.get(at..).unwrap_or("");
    let (Some(open), Some(close)) = (rest.find('('), rest.find(')')) else { return Ok(()) };
    let Some(inner) = rest.get(open + 1..close) else { return Ok(()) };
    let mut dims = Vec::new();
    for part in inner.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        match part.parse::<u64>() {
            Ok(d) => dims.push(d),
            Err(_) => dims.push(u64::MAX),
        }
    }
    checked_elements(name, &dims).map(|_| ())
}

fn parse_npy(name: &str, bytes: Vec<u8>) -> Result<Entry> {
    precheck_npy_shape(name, &bytes)?;
    let npy = NpyFile::new(bytes.as_slice()).map_err(|e| anyhow!("tensor `{name}`: not a valid .npy array: {e}"))?;
    let shape = npy
        .shape()
        .iter()
        .map(|d| usize::try_from(*d))
        .collect::<std::result::Result<Vec<usize>, _>>()
        .map_err(|_| too_many_elements(name, npy.shape()))?;
    checked_elements(name, npy.shape())?;
    let dtype = match npy.dtype() {
        DType::Plain(ts) if ts.type_char() == TypeChar::Float && ts.size_field() == 4 => SrcDtype::F32,
        DType::Plain(ts) if ts.type_char() == TypeChar::Float && ts.size_field() == 8 => SrcDtype::F64,
        DType::Plain(ts) => SrcDtype::Other(ts.to_string()),
        other => SrcDtype::Other(other.descr()),
    };
    let fortran = npy.order() == Order::Fortran;
    Ok(Entry { shape, dtype, payload: Payload::Npy { bytes, fortran } })
}

/// `name[i] is NaN (row r, column c; ...)` for the first non-finite value.
fn non_finite_error(name: &str, shape: &[usize], i: usize, what: &str) -> anyhow::Error {
    let pos = match shape {
        [_, cols] if *cols > 0 => format!("row {}, column {}; ", i / cols, i % cols),
        _ => String::new(),
    };
    anyhow!("{name}[{i}] {what} ({pos}weights must be finite)")
}

fn describe_value(v: f64) -> String {
    if v.is_nan() {
        "is NaN".to_string()
    } else if v.is_finite() {
        format!("= {v:e} does not fit in f32")
    } else if v > 0.0 {
        "is +inf".to_string()
    } else {
        "is -inf".to_string()
    }
}

impl Store {
    fn shape(&self, name: &str) -> Option<&[usize]> {
        self.entries.get(name).map(|e| e.shape.as_slice())
    }

    /// Decodes one tensor to f32 in C order, checking each value is finite
    /// (and, for f64 sources, fits in f32) under the file's own name.
    fn decode(&self, name: &str) -> Result<Tensor> {
        let e = self.entries.get(name).ok_or_else(|| anyhow!("missing tensor `{name}`"))?;
        if let SrcDtype::Other(d) = &e.dtype {
            bail!("tensor `{name}` has dtype {d}; only float32 (F32) and float64 (F64) weights are supported");
        }
        let data: Vec<f32> = match (&e.payload, &e.dtype) {
            (Payload::LeBytes(b), SrcDtype::F64) => convert_f64(
                name,
                &e.shape,
                b.chunks_exact(8).filter_map(|c| c.try_into().ok()).map(f64::from_le_bytes),
            )?,
            (Payload::LeBytes(b), _) => {
                let v: Vec<f32> = b.chunks_exact(4).filter_map(|c| c.try_into().ok()).map(f32::from_le_bytes).collect();
                check_f32(name, &e.shape, &v)?;
                v
            }
            (Payload::Npy { bytes, fortran }, dtype) => {
                let bad = |err: std::io::Error| anyhow!("tensor `{name}`: corrupt or truncated .npy data: {err}");
                let npy = NpyFile::new(bytes.as_slice()).map_err(bad)?;
                if *dtype == SrcDtype::F64 {
                    let raw: Vec<f64> = npy.into_vec().map_err(bad)?;
                    let raw = if *fortran { fortran_to_c(raw, &e.shape)? } else { raw };
                    convert_f64(name, &e.shape, raw.into_iter())?
                } else {
                    let raw: Vec<f32> = npy.into_vec().map_err(bad)?;
                    let raw = if *fortran { fortran_to_c(raw, &e.shape)? } else { raw };
                    check_f32(name, &e.shape, &raw)?;
                    raw
                }
            }
        };
        let expected: usize = e.shape.iter().product();
        if data.len() != expected {
            bail!("tensor `{name}`: {} values for shape {:?} (corrupt file)", data.len(), e.shape);
        }
        Ok(Tensor { name: name.to_string(), shape: e.shape.clone(), data })
    }
}

fn check_f32(name: &str, shape: &[usize], v: &[f32]) -> Result<()> {
    match v.iter().position(|x| !x.is_finite()) {
        Some(i) => Err(non_finite_error(name, shape, i, &describe_value(v.get(i).map_or(f64::NAN, |x| *x as f64)))),
        None => Ok(()),
    }
}

fn convert_f64(name: &str, shape: &[usize], values: impl Iterator<Item = f64>) -> Result<Vec<f32>> {
    let mut out = Vec::new();
    for (i, v) in values.enumerate() {
        let w = v as f32;
        if !w.is_finite() {
            return Err(non_finite_error(name, shape, i, &describe_value(v)));
        }
        out.push(w);
    }
    Ok(out)
}

/// Reorders column-major (Fortran) values of `shape` into row-major order.
fn fortran_to_c<T: Copy>(data: Vec<T>, shape: &[usize]) -> Result<Vec<T>> {
    if shape.len() < 2 {
        return Ok(data);
    }
    // Column-major strides: the first axis is contiguous.
    let mut strides = Vec::with_capacity(shape.len());
    let mut s = 1usize;
    for d in shape {
        strides.push(s);
        s = s.saturating_mul(*d);
    }
    let mut out = Vec::with_capacity(data.len());
    let mut idx = vec![0usize; shape.len()];
    for _ in 0..data.len() {
        let off: usize = idx.iter().zip(&strides).map(|(i, s)| i * s).sum();
        out.push(*data.get(off).ok_or_else(|| anyhow!("Fortran-ordered data shorter than its shape {shape:?}"))?);
        for (i, d) in idx.iter_mut().zip(shape).rev() {
            *i += 1;
            if *i < *d {
                break;
            }
            *i = 0;
        }
    }
    Ok(out)
}

/// Names for an error message: the first few, backquoted, then "...".
fn list_names<I, S>(names: I) -> String
where
    I: IntoIterator<Item = S>,
    S: AsRef<str>,
{
    let all: Vec<String> = names.into_iter().map(|n| format!("`{}`", n.as_ref())).collect();
    if all.len() > LIST_LIMIT {
        let shown = all.get(..LIST_LIMIT).unwrap_or(&[]).join(", ");
        format!("{shown}, ... ({} more)", all.len() - LIST_LIMIT)
    } else {
        all.join(", ")
    }
}

// ---------------------------------------------------------------------------
// Names of each layout

/// `layers.{k}.{w_x|w_h|b}` -> (k, leaf).
fn parse_lapwing(name: &str) -> Option<(usize, &str)> {
    let rest = name.strip_prefix("layers.")?;
    let (k, leaf) = rest.split_once('.')?;
    if !k.bytes().all(|c| c.is_ascii_digit()) || !matches!(leaf, "w_x" | "w_h" | "b") {
        return None;
    }
    Some((k.parse().ok()?, leaf))
}

/// Refuses a layer index beyond what the core runs, before anything is
/// sized by it.
fn check_layer_index(name: &str, k: usize) -> Result<()> {
    if k >= lapwing::MAX_LAYERS {
        bail!("tensor `{name}`: layer index {k}, but at most {} layers are supported", lapwing::MAX_LAYERS);
    }
    Ok(())
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum SplitKind {
    WeightIh,
    WeightHh,
    BiasIh,
    BiasHh,
    WeightHr,
}

#[derive(Debug, PartialEq, Eq)]
struct SplitName {
    prefix: String,
    kind: SplitKind,
    layer: usize,
    reverse: bool,
}

/// `[<prefix>.]{weight|bias}_{ih|hh|hr}_l{k}[_reverse]`.
fn parse_split(name: &str) -> Option<SplitName> {
    const KINDS: [(&str, SplitKind); 5] = [
        ("weight_ih_l", SplitKind::WeightIh),
        ("weight_hh_l", SplitKind::WeightHh),
        ("bias_ih_l", SplitKind::BiasIh),
        ("bias_hh_l", SplitKind::BiasHh),
        ("weight_hr_l", SplitKind::WeightHr),
    ];
    let (stem, reverse) = match name.strip_suffix("_reverse") {
        Some(s) => (s, true),
        None => (name, false),
    };
    let digits = stem.bytes().rev().take_while(u8::is_ascii_digit).count();
    if digits == 0 {
        return None;
    }
    let (head, k) = stem.split_at(stem.len() - digits);
    for (tag, kind) in KINDS {
        if let Some(prefix) = head.strip_suffix(tag) {
            let prefix = if prefix.is_empty() { "" } else { prefix.strip_suffix('.')? };
            return Some(SplitName { prefix: prefix.to_string(), kind, layer: k.parse().ok()?, reverse });
        }
    }
    None
}

fn join(prefix: &str, leaf: &str) -> String {
    if prefix.is_empty() {
        leaf.to_string()
    } else {
        format!("{prefix}.{leaf}")
    }
}

fn show_prefix(p: &str) -> String {
    if p.is_empty() {
        "`` (bare names)".to_string()
    } else {
        format!("`{p}`")
    }
}

/// A fused-layout name split into (group, leaf) after dropping `:0`; the
/// separator is the last `/` or `.`.
fn parse_fused(name: &str) -> Option<(&str, &str)> {
    let n = name.strip_suffix(":0").unwrap_or(name);
    let at = n.rfind(['/', '.'])?;
    Some((n.get(..at)?, n.get(at + 1..)?))
}

/// Natural order: digit runs compare by value, other runs byte by byte.
fn natural_cmp(a: &str, b: &str) -> Ordering {
    fn runs(s: &str) -> Vec<(bool, &str)> {
        let mut out = Vec::new();
        let mut start = 0;
        let bytes = s.as_bytes();
        for i in 1..=bytes.len() {
            let end = i == bytes.len();
            let split = end || bytes.get(i).map(u8::is_ascii_digit) != bytes.get(i - 1).map(u8::is_ascii_digit);
            if split {
                let digit = bytes.get(start).is_some_and(u8::is_ascii_digit);
                out.push((digit, s.get(start..i).unwrap_or("")));
                start = i;
            }
        }
        out
    }
    let (ra, rb) = (runs(a), runs(b));
    for ((da, sa), (db, sb)) in ra.iter().zip(&rb) {
        let ord = if *da && *db {
            let (ta, tb) = (sa.trim_start_matches('0'), sb.trim_start_matches('0'));
            ta.len().cmp(&tb.len()).then_with(|| ta.cmp(tb))
        } else {
            sa.cmp(sb)
        };
        if ord != Ordering::Equal {
            return ord;
        }
    }
    ra.len().cmp(&rb.len()).then_with(|| a.cmp(b))
}

fn detect(store: &Store) -> Vec<Layout> {
    let names = || store.entries.keys();
    let mut found = Vec::new();
    if names().any(|n| parse_lapwing(n).is_some() || n == "head.w") {
        found.push(Layout::Lapwing);
    }
    if names().any(|n| parse_split(n).is_some_and(|s| s.kind == SplitKind::WeightIh)) {
        found.push(Layout::Split);
    }
    if names().any(|n| parse_fused(n).is_some_and(|(_, leaf)| leaf == "recurrent_kernel")) {
        found.push(Layout::Fused);
    }
    found
}

// ---------------------------------------------------------------------------
// Building the model

/// One dimension of an expected shape: its symbol and, when known, its size.
type Dim<'a> = (&'a str, Option<usize>);

fn show_dims(dims: &[Dim<'_>]) -> String {
    let parts: Vec<String> = dims
        .iter()
        .map(|(sym, n)| match n {
            Some(n) => format!("{sym}={n}"),
            None => sym.to_string(),
        })
        .collect();
    format!("[{}]", parts.join(", "))
}

fn check_shape(t: &Tensor, dims: &[Dim<'_>]) -> Result<()> {
    let fits =
        t.shape.len() == dims.len() && t.shape.iter().zip(dims).all(|(got, (_, want))| want.is_none_or(|w| w == *got));
    if !fits {
        bail!("tensor `{}` has shape {:?}, expected {}", t.name, t.shape, show_dims(dims));
    }
    Ok(())
}

/// `4H` from a gate-stacked dimension, refusing counts not divisible by 4.
fn hidden_from_gates(t: &Tensor, gates: usize) -> Result<usize> {
    if gates == 0 || gates % 4 != 0 {
        bail!(
            "tensor `{}` has shape {:?}: its gate dimension 4H = {gates} is not a positive multiple of 4 \
             (four gate blocks)",
            t.name,
            t.shape
        );
    }
    Ok(gates / 4)
}

/// `H` from a recurrent matrix, `[4H, H]` (`gates_axis` 0) or `[H, 4H]`
/// (`gates_axis` 1), checking its whole shape.
fn recurrent_hidden(t: &Tensor, gates_axis: usize) -> Result<usize> {
    let dims = |h: Option<usize>| -> [Dim<'static>; 2] {
        let (g, h1) = (("4H", h.map(|h| 4 * h)), ("H", h));
        if gates_axis == 0 {
            [g, h1]
        } else {
            [h1, g]
        }
    };
    if t.shape.len() != 2 {
        bail!("tensor `{}` has shape {:?}, expected {}", t.name, t.shape, show_dims(&dims(None)));
    }
    let hidden = hidden_from_gates(t, t.shape.get(gates_axis).copied().unwrap_or(0))?;
    check_shape(t, &dims(Some(hidden)))?;
    Ok(hidden)
}

/// Transposes a `[rows, cols]` row-major matrix.
fn transpose(data: &[f32], rows: usize, cols: usize) -> Vec<f32> {
    let mut out = Vec::with_capacity(data.len());
    for c in 0..cols {
        out.extend((0..rows).filter_map(|r| data.get(r * cols + c)));
    }
    out
}

struct Builder<'a> {
    store: &'a Store,
    layout: Layout,
    used: BTreeSet<String>,
    notes: Vec<String>,
}

impl Builder<'_> {
    fn has(&self, name: &str) -> bool {
        self.store.entries.contains_key(name)
    }

    /// Decodes a tensor the layout requires; `role` says what it is for.
    fn take(&mut self, name: &str, role: &str) -> Result<Tensor> {
        if !self.has(name) {
            bail!("missing tensor `{name}` ({role}), expected by the {} layout", self.layout.name());
        }
        self.used.insert(name.to_string());
        self.store.decode(name)
    }

    fn take_opt(&mut self, name: &str, role: &str) -> Result<Option<Tensor>> {
        if self.has(name) {
            self.take(name, role).map(Some)
        } else {
            Ok(None)
        }
    }

    /// A layer from `w_x [4H, X]`, `w_h [4H, H]` (already in that
    /// orientation) and a folded bias; checks shapes and chaining.
    fn layer(
        &self,
        k: usize,
        prev_hidden: Option<usize>,
        w_x: Tensor,
        w_h: Tensor,
        b: Vec<f32>,
    ) -> Result<FloatLayerData> {
        let hidden = recurrent_hidden(&w_h, 0)?;
        check_shape(&w_x, &[("4H", Some(4 * hidden)), ("X", None)])?;
        let input = w_x.shape.get(1).copied().unwrap_or(0);
        if input == 0 {
            bail!("tensor `{}` has shape {:?}: layer {k} takes no inputs", w_x.name, w_x.shape);
        }
        if let Some(prev) = prev_hidden {
            if input != prev {
                bail!(
                    "layers do not chain: layer {k} takes X={input} inputs (`{}`) but layer {} has H={prev} units",
                    w_x.name,
                    k - 1
                );
            }
        }
        Ok(FloatLayerData { input, hidden, w_x: w_x.data, w_h: w_h.data, b })
    }

    fn bias(&self, b: Tensor, hidden: usize) -> Result<Vec<f32>> {
        if let [g] = b.shape.as_slice() {
            hidden_from_gates(&b, *g)?;
        }
        check_shape(&b, &[("4H", Some(4 * hidden))])?;
        Ok(b.data)
    }

    fn head(&self, w: Tensor, b: Tensor, hidden: usize) -> Result<FloatHeadData> {
        check_shape(&w, &[("Y", None), ("H", Some(hidden))])?;
        let output = w.shape.first().copied().unwrap_or(0);
        check_shape(&b, &[("Y", Some(output))])?;
        Ok(FloatHeadData { input: hidden, output, w: w.data, b: b.data })
    }

    /// `norm.mean` / `norm.std` under any of `names` (pairs), both or neither.
    fn norm(&mut self, names: &[(&str, &str)], input: usize) -> Result<Option<Normalization>> {
        let Some((mean_name, std_name)) = names.iter().copied().find(|(m, s)| self.has(m) || self.has(s)) else {
            return Ok(None);
        };
        let mean = self.take(mean_name, "input normalization mean, needed with norm.std")?;
        let std = self.take(std_name, "input normalization std, needed with norm.mean")?;
        check_shape(&mean, &[("X", Some(input))])?;
        check_shape(&std, &[("X", Some(input))])?;
        if let Some(i) = std.data.iter().position(|s| *s <= 0.0) {
            bail!("{std_name}[{i}] = {} must be positive", std.data.get(i).copied().unwrap_or(0.0));
        }
        Ok(Some(Normalization { mean: mean.data, std: std.data }))
    }

    fn lapwing(&mut self) -> Result<(FloatModelData, Option<Normalization>)> {
        let known = |n: &str| parse_lapwing(n).is_some() || matches!(n, "head.w" | "head.b" | "norm.mean" | "norm.std");
        let unknown: Vec<&String> = self.store.entries.keys().filter(|n| !known(n)).collect();
        if !unknown.is_empty() {
            bail!(
                "tensor{} not part of the lapwing layout: {} (it allows layers.{{k}}.w_x, layers.{{k}}.w_h, \
                 layers.{{k}}.b, head.w, head.b, norm.mean, norm.std)",
                if unknown.len() == 1 { "" } else { "s" },
                list_names(&unknown)
            );
        }
        for n in self.store.entries.keys() {
            if let Some((k, _)) = parse_lapwing(n) {
                check_layer_index(n, k)?;
            }
        }
        let count = self.store.entries.keys().filter_map(|n| parse_lapwing(n)).map(|(k, _)| k + 1).max().unwrap_or(0);
        if count == 0 {
            bail!("missing tensor `layers.0.w_x` (layer 0 input weights), expected by the lapwing layout");
        }
        let mut layers = Vec::with_capacity(count);
        let mut prev = None;
        for k in 0..count {
            let w_h = self.take(&format!("layers.{k}.w_h"), &format!("layer {k} recurrent weights [4H, H]"))?;
            let w_x = self.take(&format!("layers.{k}.w_x"), &format!("layer {k} input weights [4H, X]"))?;
            let b = self.take(&format!("layers.{k}.b"), &format!("layer {k} bias [4H]"))?;
            let hidden = recurrent_hidden(&w_h, 0)?;
            let b = self.bias(b, hidden)?;
            let layer = self.layer(k, prev, w_x, w_h, b)?;
            prev = Some(layer.hidden);
            layers.push(layer);
        }
        let last_h = prev.unwrap_or(0);
        let head = match (self.has("head.w"), self.has("head.b")) {
            (false, false) => None,
            _ => {
                let w = self.take("head.w", "head weights [Y, H]")?;
                let b = self.take("head.b", "head bias [Y]")?;
                Some(self.head(w, b, last_h)?)
            }
        };
        let input = layers.first().map_or(0, |l| l.input);
        let norm = self.norm(&[("norm.mean", "norm.std")], input)?;
        Ok((FloatModelData { layers, head }, norm))
    }

    fn split(&mut self, opts: &ImportOptions) -> Result<(FloatModelData, Option<Normalization>)> {
        let parsed: Vec<(String, SplitName)> =
            self.store.entries.keys().filter_map(|n| parse_split(n).map(|p| (n.clone(), p))).collect();
        let prefix = match &opts.prefix {
            Some(p) => p.trim_end_matches('.').to_string(),
            None => {
                let found: BTreeSet<&str> = parsed
                    .iter()
                    .filter(|(_, p)| p.kind == SplitKind::WeightIh)
                    .map(|(_, p)| p.prefix.as_str())
                    .collect();
                match found.len() {
                    0 => bail!(
                        "missing tensor `<prefix>.weight_ih_l0` (layer 0 input weights), expected by the split layout"
                    ),
                    1 => found.into_iter().next().unwrap_or("").to_string(),
                    _ => bail!(
                        "several LSTM prefixes found: {}; set the prefix option to one of them",
                        found.iter().map(|p| show_prefix(p)).collect::<Vec<_>>().join(", ")
                    ),
                }
            }
        };
        let mine: Vec<&(String, SplitName)> = parsed.iter().filter(|(_, p)| p.prefix == prefix).collect();
        if let Some((n, _)) = mine.iter().find(|(_, p)| p.reverse) {
            bail!(
                "tensor `{n}` belongs to a bidirectional LSTM, which Lapwing does not run (it streams one direction)"
            );
        }
        if let Some((n, _)) = mine.iter().find(|(_, p)| p.kind == SplitKind::WeightHr) {
            bail!("tensor `{n}` is an LSTM projection (proj_size > 0), which Lapwing does not support");
        }
        for (n, p) in &mine {
            check_layer_index(n, p.layer)?;
        }
        let count = mine.iter().map(|(_, p)| p.layer + 1).max().unwrap_or(0).max(1);
        let name = |leaf: &str, k: usize| join(&prefix, &format!("{leaf}_l{k}"));
        self.notes.push(format!("LSTM prefix {}", show_prefix(&prefix)));
        let mut layers = Vec::with_capacity(count);
        let mut prev = None;
        let mut zero_bias = Vec::new();
        for k in 0..count {
            let w_h = self.take(&name("weight_hh", k), &format!("layer {k} recurrent weights [4H, H]"))?;
            let w_x = self.take(&name("weight_ih", k), &format!("layer {k} input weights [4H, X]"))?;
            let hidden = recurrent_hidden(&w_h, 0)?;
            let (ih, hh) = (name("bias_ih", k), name("bias_hh", k));
            let b = match (self.has(&ih), self.has(&hh)) {
                (false, false) => {
                    zero_bias.push(k.to_string());
                    vec![0.0; 4 * hidden]
                }
                (true, false) | (false, true) => {
                    let missing = if self.has(&ih) { &hh } else { &ih };
                    bail!(
                        "missing tensor `{missing}` (layer {k} bias [4H]; the split layout needs both biases \
                         or neither), expected by the split layout"
                    );
                }
                (true, true) => {
                    let b_ih = self.take(&ih, "input bias [4H]")?;
                    let b_hh = self.take(&hh, "recurrent bias [4H]")?;
                    let b_ih = self.bias(b_ih, hidden)?;
                    let b_hh = self.bias(b_hh, hidden)?;
                    b_ih.iter().zip(&b_hh).map(|(a, b)| a + b).collect()
                }
            };
            let layer = self.layer(k, prev, w_x, w_h, b)?;
            prev = Some(layer.hidden);
            layers.push(layer);
        }
        if zero_bias.is_empty() {
            self.notes.push("bias = bias_ih + bias_hh".to_string());
        } else {
            self.notes.push(format!("no biases in layer {} (zero)", zero_bias.join(",")));
        }
        let last_h = prev.unwrap_or(0);

        let head_prefix = match &opts.head_prefix {
            Some(h) => Some(h.trim_end_matches('.').to_string()),
            None => {
                // Every unused `<p>.weight` [2-D] + `<p>.bias` [1-D] pair; those whose
                // shapes read the last hidden state are head candidates.
                let pairs: Vec<(String, bool)> = self
                    .store
                    .entries
                    .keys()
                    .filter_map(|n| {
                        let p = if n == "weight" { "" } else { n.strip_suffix(".weight")? };
                        let ws = self.store.shape(n)?;
                        let bs = self.store.shape(&join(p, "bias"))?;
                        let pair = ws.len() == 2 && bs.len() == 1 && !self.used.contains(n);
                        let fits = matches!((ws, bs), ([y, h], [yb]) if *h == last_h && y == yb && *y > 0);
                        pair.then(|| (p.to_string(), fits))
                    })
                    .collect();
                let candidates: Vec<String> = pairs.iter().filter(|(_, f)| *f).map(|(p, _)| p.clone()).collect();
                let misfits: Vec<String> = pairs
                    .iter()
                    .filter(|(_, f)| !*f)
                    .map(|(p, _)| {
                        let w = join(p, "weight");
                        let b = join(p, "bias");
                        let ws = self.store.shape(&w).unwrap_or(&[]);
                        let bs = self.store.shape(&b).unwrap_or(&[]);
                        format!("`{w}` {ws:?} + `{b}` {bs:?}")
                    })
                    .collect();
                match candidates.as_slice() {
                    [] if !misfits.is_empty() => bail!(
                        "a dense head does not fit the last layer (H = {last_h}): {}; a head needs a [Y, {last_h}] \
                         weight and a [Y] bias",
                        misfits.join(", ")
                    ),
                    [] => None,
                    [one] => Some(one.clone()),
                    many => bail!(
                        "several tensor pairs could be the head ([Y, H={last_h}] weight + [Y] bias): {}; \
                         set the head prefix option to one of them",
                        many.iter().map(|p| show_prefix(p)).collect::<Vec<_>>().join(", ")
                    ),
                }
            }
        };
        let head = match head_prefix {
            Some(hp) => {
                let w = self.take(&join(&hp, "weight"), "head weights [Y, H]")?;
                let b = self.take(&join(&hp, "bias"), "head bias [Y]")?;
                self.notes.push(format!("head {}", show_prefix(&hp)));
                Some(self.head(w, b, last_h)?)
            }
            None => None,
        };
        let input = layers.first().map_or(0, |l| l.input);
        let norm = self.norm(&[("norm.mean", "norm.std")], input)?;
        Ok((FloatModelData { layers, head }, norm))
    }

    fn fused(&mut self, opts: &ImportOptions) -> Result<(FloatModelData, Option<Normalization>)> {
        // group -> leaf -> original name
        let mut groups: BTreeMap<String, BTreeMap<String, String>> = BTreeMap::new();
        for n in self.store.entries.keys() {
            if let Some((g, leaf)) = parse_fused(n) {
                groups.entry(g.to_string()).or_default().insert(leaf.to_string(), n.clone());
            }
        }
        let under = |g: &str, p: &str| {
            p.is_empty() || g == p || g.strip_prefix(p).is_some_and(|r| r.starts_with('/') || r.starts_with('.'))
        };
        let mut layer_groups: Vec<&String> = groups
            .iter()
            .filter(|(g, leaves)| {
                leaves.contains_key("recurrent_kernel") && opts.prefix.as_deref().is_none_or(|p| under(g, p))
            })
            .map(|(g, _)| g)
            .collect();
        if layer_groups.is_empty() {
            bail!(
                "missing tensor `{}recurrent_kernel` (layer 0 recurrent kernel [H, 4H]), expected by the fused layout",
                opts.prefix.as_deref().map_or("<group>/".to_string(), |p| format!("{p}/<group>/"))
            );
        }
        if let Some(g) = layer_groups.iter().find(|g| {
            let l = g.to_ascii_lowercase();
            l.contains("backward") || l.contains("reverse")
        }) {
            bail!("layer group `{g}` looks like the backward half of a bidirectional LSTM, which Lapwing does not run");
        }
        layer_groups.sort_by(|a, b| natural_cmp(a, b));
        self.notes.push(format!(
            "layer groups {}",
            layer_groups.iter().map(|g| format!("`{g}`")).collect::<Vec<_>>().join(", ")
        ));
        let leaf_name = |g: &str, leaf: &str| -> String {
            groups.get(g).and_then(|l| l.get(leaf)).cloned().unwrap_or_else(|| format!("{g}/{leaf}"))
        };
        let mut layers = Vec::with_capacity(layer_groups.len());
        let mut prev = None;
        let mut zero_bias = Vec::new();
        for (k, g) in layer_groups.iter().enumerate() {
            let rk = self.take(&leaf_name(g, "recurrent_kernel"), &format!("layer {k} recurrent kernel [H, 4H]"))?;
            let kn = self.take(&leaf_name(g, "kernel"), &format!("layer {k} input kernel [X, 4H]"))?;
            let hidden = recurrent_hidden(&rk, 1)?;
            if let [_, g4] = kn.shape.as_slice() {
                hidden_from_gates(&kn, *g4)?;
            }
            check_shape(&kn, &[("X", None), ("4H", Some(4 * hidden))])?;
            let input = kn.shape.first().copied().unwrap_or(0);
            let bias_name = leaf_name(g, "bias");
            let b = match self.take_opt(&bias_name, &format!("layer {k} bias [4H]"))? {
                Some(b) => self.bias(b, hidden)?,
                None => {
                    zero_bias.push(k.to_string());
                    vec![0.0; 4 * hidden]
                }
            };
            // [X, 4H] -> [4H, X] and [H, 4H] -> [4H, H]; i,f,c,o rows = i,f,g,o.
            let w_x =
                Tensor { name: kn.name, shape: vec![4 * hidden, input], data: transpose(&kn.data, input, 4 * hidden) };
            let w_h = Tensor {
                name: rk.name,
                shape: vec![4 * hidden, hidden],
                data: transpose(&rk.data, hidden, 4 * hidden),
            };
            let layer = self.layer(k, prev, w_x, w_h, b)?;
            prev = Some(layer.hidden);
            layers.push(layer);
        }
        if !zero_bias.is_empty() {
            self.notes.push(format!("no bias in layer {} (zero)", zero_bias.join(",")));
        }
        let last_h = prev.unwrap_or(0);

        let head_group = match &opts.head_prefix {
            Some(h) => {
                let h = h.trim_end_matches(['/', '.']).to_string();
                if !groups.get(&h).is_some_and(|l| l.contains_key("kernel")) {
                    bail!("missing tensor `{h}/kernel` (head kernel [H, Y]), expected by the fused layout");
                }
                Some(h)
            }
            None => {
                let candidates: Vec<&String> = groups
                    .iter()
                    .filter(|(_, leaves)| !leaves.contains_key("recurrent_kernel"))
                    .filter(|(_, leaves)| {
                        let shapes = leaves
                            .get("kernel")
                            .and_then(|k| self.store.shape(k))
                            .zip(leaves.get("bias").and_then(|b| self.store.shape(b)));
                        matches!(shapes, Some(([h, y], [yb])) if *h == last_h && y == yb && *y > 0)
                    })
                    .map(|(g, _)| g)
                    .collect();
                match candidates.as_slice() {
                    [] => None,
                    [one] => Some((*one).clone()),
                    many => bail!(
                        "several groups could be the head (kernel [H={last_h}, Y] + bias [Y]): {}; \
                         set the head prefix option to one of them",
                        list_names(many)
                    ),
                }
            }
        };
        let head = match head_group {
            Some(g) => {
                let kn = self.take(&leaf_name(&g, "kernel"), "head kernel [H, Y]")?;
                let b = self.take(&leaf_name(&g, "bias"), "head bias [Y]")?;
                check_shape(&kn, &[("H", Some(last_h)), ("Y", None)])?;
                let y = kn.shape.get(1).copied().unwrap_or(0);
                let w = Tensor { name: kn.name, shape: vec![y, last_h], data: transpose(&kn.data, last_h, y) };
                self.notes.push(format!("head group `{g}`"));
                Some(self.head(w, b, last_h)?)
            }
            None => None,
        };
        let input = layers.first().map_or(0, |l| l.input);
        let norm = self.norm(
            &[
                ("norm.mean", "norm.std"),
                ("norm/mean", "norm/std"),
                ("norm.mean:0", "norm.std:0"),
                ("norm/mean:0", "norm/std:0"),
            ],
            input,
        )?;
        Ok((FloatModelData { layers, head }, norm))
    }
}

// ---------------------------------------------------------------------------
// .npz archives (the `zip` crate, deflate only)

mod npz {
    //! Reads every member of a `.npz` (a zip archive of `.npy` files). The
    //! `zip` crate checks each member's CRC-32 as it is read; member sizes
    //! are limited before anything is allocated.

    use super::MAX_TENSOR_BYTES;
    use anyhow::{anyhow, bail, Result};
    use std::fs::File;
    use std::io::Read;

    /// Every member's name and uncompressed bytes, in archive order.
    pub(super) fn read_members(f: File) -> Result<Vec<(String, Vec<u8>)>> {
        let mut archive =
            zip::ZipArchive::new(f).map_err(|e| anyhow!("not a valid .npz archive (corrupt or truncated): {e}"))?;
        let mut out = Vec::with_capacity(archive.len());
        for i in 0..archive.len() {
            let mut member = archive.by_index(i).map_err(|e| anyhow!("not a valid .npz archive: member {i}: {e}"))?;
            let name = member.name().to_string();
            if member.size() > MAX_TENSOR_BYTES {
                bail!("archive member `{name}` is {} bytes, over the limit of {MAX_TENSOR_BYTES}", member.size());
            }
            let mut buf = Vec::with_capacity(member.size() as usize);
            // Read at most one byte more than declared, so a lying header
            // cannot make us allocate without bound.
            (&mut member)
                .take(MAX_TENSOR_BYTES + 1)
                .read_to_end(&mut buf)
                .map_err(|e| anyhow!("not a valid .npz archive: member `{name}`: {e}"))?;
            if buf.len() as u64 != member.size() {
                bail!("not a valid .npz archive: member `{name}` does not have its declared size");
            }
            out.push((name, buf));
        }
        Ok(out)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn natural_order_puts_lstm_10_after_lstm_2() {
        let mut v = vec!["lstm_10", "lstm_2", "lstm", "lstm_1", "lstm/cell", "lstm_1/cell"];
        v.sort_by(|a, b| natural_cmp(a, b));
        assert_eq!(v, ["lstm", "lstm/cell", "lstm_1", "lstm_1/cell", "lstm_2", "lstm_10"]);
    }

    #[test]
    fn split_names_parse() {
        let p = parse_split("rnn.weight_ih_l12").unwrap();
        assert_eq!(p, SplitName { prefix: "rnn".into(), kind: SplitKind::WeightIh, layer: 12, reverse: false });
        let p = parse_split("bias_hh_l0_reverse").unwrap();
        assert_eq!(p, SplitName { prefix: String::new(), kind: SplitKind::BiasHh, layer: 0, reverse: true });
        assert_eq!(parse_split("a.b.weight_hr_l1").unwrap().prefix, "a.b");
        assert!(parse_split("rnnweight_ih_l0").is_none());
        assert!(parse_split("rnn.weight_ih_l").is_none());
        assert!(parse_split("proj.weight").is_none());
    }

    #[test]
    fn fused_and_lapwing_names_parse() {
        assert_eq!(parse_fused("lstm_1/recurrent_kernel:0"), Some(("lstm_1", "recurrent_kernel")));
        assert_eq!(parse_fused("model.lstm.kernel"), Some(("model.lstm", "kernel")));
        assert_eq!(parse_fused("kernel"), None);
        assert_eq!(parse_lapwing("layers.3.w_h"), Some((3, "w_h")));
        assert_eq!(parse_lapwing("layers.x.w_h"), None);
        assert_eq!(parse_lapwing("layers.0.w_y"), None);
    }

    #[test]
    fn layout_names_round_trip() {
        for l in Layout::ALL {
            assert_eq!(l.name().parse::<Layout>().unwrap(), l);
        }
        assert_eq!(Layout::Fused.source_gate_order(), "i,f,c,o");
        let e = "keras".parse::<Layout>().unwrap_err().to_string();
        assert!(e.contains("keras") && e.contains("lapwing, split, fused"), "{e}");
    }

    #[test]
    fn fortran_order_is_reordered() {
        // [[1, 2, 3], [4, 5, 6]] stored column-major.
        let f = vec![1, 4, 2, 5, 3, 6];
        assert_eq!(fortran_to_c(f, &[2, 3]).unwrap(), vec![1, 2, 3, 4, 5, 6]);
        // 3-D: element (i, j, k) at i + 2 j + 4 k.
        let shape = [2, 2, 2];
        let f: Vec<usize> = (0..8).collect();
        let c = fortran_to_c(f, &shape).unwrap();
        assert_eq!(c, vec![0, 4, 2, 6, 1, 5, 3, 7]);
    }

    #[test]
    fn element_limit_is_checked_without_overflow() {
        assert!(checked_elements("t", &[1 << 13, 1 << 13]).is_ok());
        let e = checked_elements("big", &[1 << 13, (1 << 13) + 1]).unwrap_err().to_string();
        assert!(e.contains("`big`") && e.contains("2^26"), "{e}");
        assert!(checked_elements("o", &[u64::MAX, 3]).is_err());
    }

    #[test]
    fn non_finite_index_names_row_and_column() {
        let e = non_finite_error("rnn.weight_hh_l1", &[64, 16], 37, "is NaN").to_string();
        assert!(e.starts_with("rnn.weight_hh_l1[37] is NaN (row 2, column 5"), "{e}");
    }
}
