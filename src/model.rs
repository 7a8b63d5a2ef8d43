//! The device model blob (`.lwq`): zero-copy parse from flash, validated up
//! front.
//!
//! # Format, version 1 (little-endian throughout)
//! ```text
//! offset  size  field
//!      0     4  magic "LPWQ"
//!      4     2  format version (1)
//!      6     2  header length (32)
//!      8     1  scheme (0 = w8a16, 1 = w8a8, 2 = w16a16)
//!      9     1  cell width (0 = c16, 1 = c32)
//!     10     1  activation table (0 = standard, 1 = compact)
//!     11     1  layer count (1..=MAX_LAYERS)
//!     12     2  input features X
//!     14     2  output values (Y with a head, else the last H)
//!     16     1  flags (bit 0: has a head; bit 1: has a detector; others 0)
//!     17     1  reserved (0)
//!     18     2  section count
//!     20     4  total length in bytes, CRC included
//!     24     4  state words the model needs (i16)
//!     28     4  reserved (0)
//!     32  20*n  section table, one entry per section:
//!               kind u8, layer u8, element type u8, reserved u8 (0),
//!               rows u32, cols u32, offset u32, length u32
//!      …        payloads, each at a 4-byte aligned offset, in table order,
//!               gaps zero-filled
//!    end-4   4  CRC-32/ISO-HDLC of every byte before it
//! ```
//! Element types: 1 = i8, 2 = i16, 3 = i32, 4 = f32. Weight sections are
//! i8, or i16 for `w16a16`. Section kinds are listed in
//! [`SectionKind`]; every layer has all eight layer sections, the head
//! sections appear exactly when the head flag is set, the two detector
//! sections exactly when the detector flag is set (which needs a head that
//! predicts every input), and the two scale sections always. The blob must start at a 4-byte aligned address (the
//! generated Rust module guarantees it), so `i32` and `f32` payloads are
//! borrowed in place, never copied.
//!
//! # What parsing proves
//! [`Blob::parse`] checks the magic, version, every header field, the total
//! length, the CRC, every section entry (known kind and layer, element type,
//! `rows * cols * size == length`, alignment, bounds, order, no overlap,
//! zero padding), that every required section is present exactly once, that
//! all dimensions agree, that every input and output scale is finite and
//! positive, and finally runs the same validation as [`QModel::new`]
//! (accumulator bounds, requantization ranges, cell format).
//! After it succeeds, a step can fail only on the caller's buffer lengths.

use crate::activation::TableKind;
use crate::detect::Detector;
pub use crate::quant::Scheme;
use crate::quant::{state_words_for, CellWidth, QHead, QLayer, QModel, RowScales, Weights};
use crate::{Error, MAX_LAYERS};

/// The four magic bytes at the start of every blob.
pub const MAGIC: [u8; 4] = *b"LPWQ";
/// The format version this parser reads and the host tool writes.
pub const VERSION: u16 = 1;
/// Bytes of the fixed header.
pub const HEADER_LEN: usize = 32;
/// Bytes of one section-table entry.
pub const ENTRY_LEN: usize = 20;
/// Alignment of every payload (and of the blob's start address).
pub const ALIGN: usize = 4;
/// Largest dimension (rows or cols) the parser accepts.
pub const MAX_DIM: u32 = 1 << 16;

/// The CRC of the format: CRC-32/ISO-HDLC (the IEEE 802.3 polynomial), in its
/// table-less form to keep flash small; parsing is done once at start-up.
pub const CRC: crc::Crc<u32, crc::NoTable> = crc::Crc::<u32, crc::NoTable>::new(&crc::CRC_32_ISO_HDLC);

/// Element type of a section.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
#[repr(u8)]
pub enum ElemType {
    /// Signed byte.
    I8 = 1,
    /// Signed 16-bit integer.
    I16 = 2,
    /// Signed 32-bit integer.
    I32 = 3,
    /// IEEE 754 single (scales for the host; the device step never reads them).
    F32 = 4,
}

impl ElemType {
    /// Bytes per element.
    pub const fn size(self) -> usize {
        match self {
            ElemType::I8 => 1,
            ElemType::I16 => 2,
            ElemType::I32 | ElemType::F32 => 4,
        }
    }

    /// Short name (`i8`, `i32`, `f32`).
    pub fn name(self) -> &'static str {
        match self {
            ElemType::I8 => "i8",
            ElemType::I16 => "i16",
            ElemType::I32 => "i32",
            ElemType::F32 => "f32",
        }
    }
}

/// What a section holds. Layer sections carry their layer index; the others
/// have layer 0.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
#[repr(u8)]
pub enum SectionKind {
    /// `[1, 4]` i32: input X, hidden H, cell fractional bits, 0.
    LayerInfo = 1,
    /// `[4H, X]` input weights (i8, or i16 for `w16a16`), gates `i, f, g, o`.
    LayerWx = 2,
    /// `[4H, H]` recurrent weights (i8, or i16 for `w16a16`).
    LayerWh = 3,
    /// `[4H, 1]` i32 bias in pre-activation units.
    LayerBias = 4,
    /// `[4H, 1]` i32 multipliers of the input accumulators.
    LayerRqXMult = 5,
    /// `[4H, 1]` i8 shifts of the input accumulators.
    LayerRqXShift = 6,
    /// `[4H, 1]` i32 multipliers of the recurrent accumulators.
    LayerRqHMult = 7,
    /// `[4H, 1]` i8 shifts of the recurrent accumulators.
    LayerRqHShift = 8,
    /// `[Y, H]` head weights (i8, or i16 for `w16a16`).
    HeadW = 16,
    /// `[Y, 1]` i32 head bias in output units.
    HeadBias = 17,
    /// `[Y, 1]` i32 head multipliers.
    HeadRqMult = 18,
    /// `[Y, 1]` i8 head shifts.
    HeadRqShift = 19,
    /// `[X, 1]` f32: real value of one input LSB per feature.
    InputScale = 32,
    /// `[out, 1]` f32: real value of one output LSB per output.
    OutputScale = 33,
    /// `[1, 8]` i32: detector warm-up steps, EWMA shift, k, n, raise level,
    /// clear level (`u32` bit patterns), 0, 0.
    DetectorInfo = 48,
    /// `[X, 4]` i32: per feature the requantizations `(a_mult, a_shift,
    /// b_mult, b_shift)` of the input and the prediction (see
    /// [`crate::detect`]).
    DetectorScales = 49,
}

/// Sections every layer has, in the order the host tool writes them.
pub const LAYER_KINDS: [SectionKind; 8] = [
    SectionKind::LayerInfo,
    SectionKind::LayerWx,
    SectionKind::LayerWh,
    SectionKind::LayerBias,
    SectionKind::LayerRqXMult,
    SectionKind::LayerRqXShift,
    SectionKind::LayerRqHMult,
    SectionKind::LayerRqHShift,
];
/// Head sections, in write order.
pub const HEAD_KINDS: [SectionKind; 4] =
    [SectionKind::HeadW, SectionKind::HeadBias, SectionKind::HeadRqMult, SectionKind::HeadRqShift];
/// Model-wide sections, in write order.
pub const MODEL_KINDS: [SectionKind; 2] = [SectionKind::InputScale, SectionKind::OutputScale];
/// Detector sections (present exactly when the header's detector flag is
/// set), in write order.
pub const DETECTOR_KINDS: [SectionKind; 2] = [SectionKind::DetectorInfo, SectionKind::DetectorScales];
/// Most sections a valid blob can have.
pub const MAX_SECTIONS: usize =
    MAX_LAYERS * LAYER_KINDS.len() + HEAD_KINDS.len() + MODEL_KINDS.len() + DETECTOR_KINDS.len();

impl SectionKind {
    /// From the table byte.
    pub fn from_u8(v: u8) -> Option<SectionKind> {
        [LAYER_KINDS.as_slice(), HEAD_KINDS.as_slice(), MODEL_KINDS.as_slice(), DETECTOR_KINDS.as_slice()]
            .into_iter()
            .flatten()
            .copied()
            .find(|k| *k as u8 == v)
    }

    /// The element type this kind must have in a blob of `scheme`.
    pub fn elem(self, scheme: Scheme) -> ElemType {
        use SectionKind::*;
        match self {
            LayerWx | LayerWh | HeadW if scheme == Scheme::W16A16 => ElemType::I16,
            LayerWx | LayerWh | LayerRqXShift | LayerRqHShift | HeadW | HeadRqShift => ElemType::I8,
            LayerInfo | LayerBias | LayerRqXMult | LayerRqHMult | HeadBias | HeadRqMult | DetectorInfo
            | DetectorScales => ElemType::I32,
            InputScale | OutputScale => ElemType::F32,
        }
    }

    /// True for sections that belong to one layer.
    pub fn per_layer(self) -> bool {
        LAYER_KINDS.contains(&self)
    }

    /// A short name for reports (`w_x`, `head.rq_mult`, ...).
    pub fn name(self) -> &'static str {
        use SectionKind::*;
        match self {
            LayerInfo => "info",
            LayerWx => "w_x",
            LayerWh => "w_h",
            LayerBias => "bias",
            LayerRqXMult => "rq_x.mult",
            LayerRqXShift => "rq_x.shift",
            LayerRqHMult => "rq_h.mult",
            LayerRqHShift => "rq_h.shift",
            HeadW => "head.w",
            HeadBias => "head.bias",
            HeadRqMult => "head.rq.mult",
            HeadRqShift => "head.rq.shift",
            InputScale => "input_scale",
            OutputScale => "output_scale",
            DetectorInfo => "detector.info",
            DetectorScales => "detector.scales",
        }
    }
}

/// Why a blob was refused. Each variant names what was wrong.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum BlobError {
    /// Fewer bytes than a header, a section table or a CRC needs.
    TooShort {
        /// Bytes needed.
        need: usize,
        /// Bytes given.
        got: usize,
    },
    /// The blob does not start at a 4-byte aligned address.
    Misaligned,
    /// This build runs on a big-endian target; blobs are little-endian.
    BigEndianTarget,
    /// The first four bytes are not [`MAGIC`].
    Magic,
    /// A format version this parser does not read.
    Version {
        /// Version found.
        found: u16,
    },
    /// A header field is out of range.
    Header {
        /// Which field.
        field: &'static str,
        /// The value found.
        value: u32,
    },
    /// The header's total length differs from the bytes given.
    Length {
        /// Total length in the header.
        header: u32,
        /// Bytes given.
        got: usize,
    },
    /// The stored CRC does not match the bytes.
    Crc {
        /// CRC stored at the end.
        stored: u32,
        /// CRC of the bytes before it.
        computed: u32,
    },
    /// A section-table entry is invalid.
    Section {
        /// Entry index.
        index: usize,
        /// What is wrong with it.
        problem: &'static str,
    },
    /// A required section is missing.
    Missing {
        /// Kind (see [`SectionKind`]).
        kind: SectionKind,
        /// Layer index (0 for model sections).
        layer: u8,
    },
    /// A section appears twice.
    Duplicate {
        /// Kind.
        kind: SectionKind,
        /// Layer index.
        layer: u8,
    },
    /// A layer-info section holds an invalid value.
    LayerInfo {
        /// Layer index.
        layer: u8,
        /// What is wrong.
        problem: &'static str,
    },
    /// A scale is not finite and positive.
    Scale {
        /// `InputScale` or `OutputScale`.
        kind: SectionKind,
        /// Index of the first bad value.
        index: usize,
    },
    /// Dimensions disagree between sections or with the header.
    Dims {
        /// Which relation failed.
        what: &'static str,
        /// Value the other fields require.
        expected: u32,
        /// Value found.
        got: u32,
    },
}

impl core::fmt::Display for BlobError {
    fn fmt(&self, f: &mut core::fmt::Formatter<'_>) -> core::fmt::Result {
        match *self {
            BlobError::TooShort { need, got } => write!(f, "blob is truncated: needs {need} bytes, has {got}"),
            BlobError::Misaligned => write!(f, "blob does not start at a 4-byte aligned address"),
            BlobError::BigEndianTarget => write!(f, "blobs are little-endian and this target is big-endian"),
            BlobError::Magic => write!(f, "not a Lapwing blob (magic bytes are not \"LPWQ\")"),
            BlobError::Version { found } => {
                write!(f, "blob format version {found} is not supported (this build reads version {VERSION})")
            }
            BlobError::Header { field, value } => write!(f, "header field `{field}` = {value} is invalid"),
            BlobError::Length { header, got } => {
                write!(f, "header says the blob has {header} bytes, but {got} were given (truncated or padded?)")
            }
            BlobError::Crc { stored, computed } => {
                write!(f, "CRC mismatch: stored {stored:#010x}, computed {computed:#010x} (the blob is corrupted)")
            }
            BlobError::Section { index, problem } => write!(f, "section {index}: {problem}"),
            BlobError::Missing { kind, layer } => write!(f, "section `{}` of layer {layer} is missing", kind.name()),
            BlobError::Duplicate { kind, layer } => {
                write!(f, "section `{}` of layer {layer} appears more than once", kind.name())
            }
            BlobError::LayerInfo { layer, problem } => write!(f, "layer {layer} info: {problem}"),
            BlobError::Scale { kind, index } => {
                write!(f, "section `{}`[{index}] is not a finite positive scale", kind.name())
            }
            BlobError::Dims { what, expected, got } => write!(f, "{what}: expected {expected}, found {got}"),
        }
    }
}

/// One section-table entry, as parsed.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct SectionInfo {
    /// What it holds.
    pub kind: SectionKind,
    /// Layer index (0 for model sections).
    pub layer: u8,
    /// Element type.
    pub elem: ElemType,
    /// Rows.
    pub rows: u32,
    /// Columns.
    pub cols: u32,
    /// Payload offset from the start of the blob.
    pub offset: u32,
    /// Payload bytes.
    pub len: u32,
}

/// The fixed header, decoded.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Header {
    /// Integer scheme.
    pub scheme: Scheme,
    /// Cell width.
    pub cell: CellWidth,
    /// Activation table.
    pub table: TableKind,
    /// Layers.
    pub layers: u8,
    /// Input features X.
    pub input: u16,
    /// Output values.
    pub output: u16,
    /// Whether a dense head follows the last layer.
    pub has_head: bool,
    /// Whether anomaly-detector parameters are present.
    pub has_detector: bool,
    /// Sections in the table.
    pub sections: u16,
    /// Total bytes, CRC included.
    pub total_len: u32,
    /// State words the model needs.
    pub state_words: u32,
}

/// A parsed, validated blob: the model borrowed from the bytes in place.
#[derive(Clone, Debug)]
pub struct Blob<'a> {
    header: Header,
    bytes: &'a [u8],
    model: QModel<'a>,
    input_scale: &'a [f32],
    output_scale: &'a [f32],
    detector: Option<Detector<'a>>,
}

fn rd_u16(b: &[u8], at: usize) -> Option<u16> {
    b.get(at..at + 2).and_then(|s| s.try_into().ok()).map(u16::from_le_bytes)
}

fn rd_u32(b: &[u8], at: usize) -> Option<u32> {
    b.get(at..at + 4).and_then(|s| s.try_into().ok()).map(u32::from_le_bytes)
}

fn rd_u8(b: &[u8], at: usize) -> Option<u8> {
    b.get(at).copied()
}

/// Reads the header without checking anything but its length.
fn read_header_fields(b: &[u8]) -> Option<[u32; 13]> {
    Some([
        rd_u16(b, 4)? as u32,
        rd_u16(b, 6)? as u32,
        rd_u8(b, 8)? as u32,
        rd_u8(b, 9)? as u32,
        rd_u8(b, 10)? as u32,
        rd_u8(b, 11)? as u32,
        rd_u16(b, 12)? as u32,
        rd_u16(b, 14)? as u32,
        rd_u8(b, 16)? as u32,
        rd_u8(b, 17)? as u32,
        rd_u16(b, 18)? as u32,
        rd_u32(b, 20)?,
        rd_u32(b, 24)?,
    ])
}

/// Decodes and checks the fixed header (not the CRC or sections).
///
/// # Errors
/// [`BlobError::TooShort`], [`BlobError::Magic`], [`BlobError::Version`],
/// [`BlobError::Header`].
pub fn parse_header(bytes: &[u8]) -> Result<Header, BlobError> {
    if bytes.len() < HEADER_LEN {
        return Err(BlobError::TooShort { need: HEADER_LEN, got: bytes.len() });
    }
    if bytes.get(..4) != Some(MAGIC.as_slice()) {
        return Err(BlobError::Magic);
    }
    let [version, hlen, scheme, cell, table, layers, input, output, flags, res8, sections, total, state] =
        read_header_fields(bytes).ok_or(BlobError::TooShort { need: HEADER_LEN, got: bytes.len() })?;
    if version != VERSION as u32 {
        return Err(BlobError::Version { found: version as u16 });
    }
    let bad = |field: &'static str, value: u32| Err(BlobError::Header { field, value });
    if hlen as usize != HEADER_LEN {
        return bad("header length", hlen);
    }
    let Some(scheme) = Scheme::from_u8(scheme as u8) else { return bad("scheme", scheme) };
    let cell = match cell {
        0 => CellWidth::C16,
        1 => CellWidth::C32,
        _ => return bad("cell width", cell),
    };
    let Some(table) = TableKind::from_u8(table as u8) else { return bad("activation table", table) };
    if layers == 0 || layers as usize > MAX_LAYERS {
        return bad("layer count", layers);
    }
    if input == 0 {
        return bad("input features", input);
    }
    if output == 0 {
        return bad("output values", output);
    }
    if flags & !3 != 0 {
        return bad("flags", flags);
    }
    if res8 != 0 {
        return bad("reserved byte 17", res8);
    }
    if rd_u32(bytes, 28) != Some(0) {
        return bad("reserved word 28", rd_u32(bytes, 28).unwrap_or(0));
    }
    Ok(Header {
        scheme,
        cell,
        table,
        layers: layers as u8,
        input: input as u16,
        output: output as u16,
        has_head: flags & 1 == 1,
        has_detector: flags & 2 == 2,
        sections: sections as u16,
        total_len: total,
        state_words: state,
    })
}

/// Decodes section-table entry `index` of a blob whose header was checked.
fn read_entry(bytes: &[u8], index: usize, scheme: Scheme) -> Result<SectionInfo, BlobError> {
    let at = HEADER_LEN + index * ENTRY_LEN;
    let short = BlobError::TooShort { need: at + ENTRY_LEN, got: bytes.len() };
    let e = bytes.get(at..at + ENTRY_LEN).ok_or(short)?;
    let problem = |problem: &'static str| BlobError::Section { index, problem };
    let kind = SectionKind::from_u8(rd_u8(e, 0).ok_or(short)?).ok_or(problem("unknown section kind"))?;
    let layer = rd_u8(e, 1).ok_or(short)?;
    let elem = match rd_u8(e, 2).ok_or(short)? {
        1 => ElemType::I8,
        2 => ElemType::I16,
        3 => ElemType::I32,
        4 => ElemType::F32,
        _ => return Err(problem("unknown element type")),
    };
    if elem != kind.elem(scheme) {
        return Err(problem("element type does not match the section kind"));
    }
    if rd_u8(e, 3) != Some(0) {
        return Err(problem("reserved byte is not 0"));
    }
    let [rows, cols, offset, len] = [4, 8, 12, 16].map(|o| rd_u32(e, o).unwrap_or(u32::MAX));
    if rows == 0 || cols == 0 || rows > MAX_DIM || cols > MAX_DIM {
        return Err(problem("rows or cols outside 1..=65536"));
    }
    let size = (rows as u64) * (cols as u64) * elem.size() as u64;
    if size != len as u64 {
        return Err(problem("length is not rows * cols * element size"));
    }
    if offset as usize % ALIGN != 0 {
        return Err(problem("payload offset is not 4-byte aligned"));
    }
    Ok(SectionInfo { kind, layer, elem, rows, cols, offset, len })
}

/// Indices into the found-sections table.
fn slot(kind: SectionKind, layer: u8) -> usize {
    let layer_kinds = LAYER_KINDS.len();
    if let Some(i) = LAYER_KINDS.iter().position(|k| *k == kind) {
        layer as usize * layer_kinds + i
    } else if let Some(i) = HEAD_KINDS.iter().position(|k| *k == kind) {
        MAX_LAYERS * layer_kinds + i
    } else {
        let base = MAX_LAYERS * layer_kinds + HEAD_KINDS.len();
        match MODEL_KINDS.iter().position(|k| *k == kind) {
            Some(i) => base + i,
            None => base + MODEL_KINDS.len() + DETECTOR_KINDS.iter().position(|k| *k == kind).unwrap_or(0),
        }
    }
}

struct Found<'a> {
    bytes: &'a [u8],
    entries: [Option<SectionInfo>; MAX_SECTIONS],
}

impl<'a> Found<'a> {
    fn get(&self, kind: SectionKind, layer: u8) -> Result<(SectionInfo, &'a [u8]), BlobError> {
        let info = self.entries.get(slot(kind, layer)).copied().flatten().ok_or(BlobError::Missing { kind, layer })?;
        let start = info.offset as usize;
        let payload = self
            .bytes
            .get(start..start + info.len as usize)
            .ok_or(BlobError::TooShort { need: start + info.len as usize, got: self.bytes.len() })?;
        Ok((info, payload))
    }

    fn dims(&self, kind: SectionKind, layer: u8, rows: u32, cols: u32) -> Result<&'a [u8], BlobError> {
        let (info, payload) = self.get(kind, layer)?;
        let what = kind.name();
        if info.rows != rows {
            return Err(BlobError::Dims { what: dims_what(what, true), expected: rows, got: info.rows });
        }
        if info.cols != cols {
            return Err(BlobError::Dims { what: dims_what(what, false), expected: cols, got: info.cols });
        }
        Ok(payload)
    }

    fn i8s(&self, kind: SectionKind, layer: u8, rows: u32, cols: u32) -> Result<&'a [i8], BlobError> {
        let p = self.dims(kind, layer, rows, cols)?;
        bytemuck::try_cast_slice(p).map_err(|_| BlobError::Misaligned)
    }

    fn i16s(&self, kind: SectionKind, layer: u8, rows: u32, cols: u32) -> Result<&'a [i16], BlobError> {
        let p = self.dims(kind, layer, rows, cols)?;
        bytemuck::try_cast_slice(p).map_err(|_| BlobError::Misaligned)
    }

    fn weights(
        &self,
        scheme: Scheme,
        kind: SectionKind,
        layer: u8,
        rows: u32,
        cols: u32,
    ) -> Result<Weights<'a>, BlobError> {
        Ok(match scheme {
            Scheme::W16A16 => Weights::I16(self.i16s(kind, layer, rows, cols)?),
            Scheme::W8A16 | Scheme::W8A8 => Weights::I8(self.i8s(kind, layer, rows, cols)?),
        })
    }

    fn i32s(&self, kind: SectionKind, layer: u8, rows: u32, cols: u32) -> Result<&'a [i32], BlobError> {
        let p = self.dims(kind, layer, rows, cols)?;
        bytemuck::try_cast_slice(p).map_err(|_| BlobError::Misaligned)
    }

    fn f32s(&self, kind: SectionKind, rows: u32) -> Result<&'a [f32], BlobError> {
        let p = self.dims(kind, 0, rows, 1)?;
        bytemuck::try_cast_slice(p).map_err(|_| BlobError::Misaligned)
    }
}

/// Static descriptions for [`BlobError::Dims`] (no formatting in `no_std`).
fn dims_what(section: &'static str, rows: bool) -> &'static str {
    match (section, rows) {
        ("info", true) => "layer info rows",
        ("info", false) => "layer info cols (4)",
        ("w_x", true) => "w_x rows (4H)",
        ("w_x", false) => "w_x cols (layer input)",
        ("w_h", true) => "w_h rows (4H)",
        ("w_h", false) => "w_h cols (H)",
        ("head.w", true) => "head.w rows (header output count)",
        ("head.w", false) => "head.w cols (last layer's H)",
        ("input_scale", _) => "input_scale length (header input count)",
        ("output_scale", _) => "output_scale length (header output count)",
        (_, true) => "per-row section length (4H or Y)",
        (_, false) => "per-row section cols (1)",
    }
}

fn scales<'a>(
    found: &Found<'a>,
    mult: SectionKind,
    shift: SectionKind,
    layer: u8,
    rows: u32,
) -> Result<RowScales<'a>, Error> {
    let m = found.i32s(mult, layer, rows, 1)?;
    let s = found.i8s(shift, layer, rows, 1)?;
    RowScales::new(m, s)
}

/// Puts the real layer index into an accumulator-bound error (the layer
/// constructors do not know where they sit; the head counts as the layer
/// after the last).
fn at_layer(e: Error, layer: usize) -> Error {
    match e {
        Error::AccumulatorBound { what, row, .. } => Error::AccumulatorBound { what, layer, row },
        other => other,
    }
}

impl From<BlobError> for Error {
    fn from(e: BlobError) -> Self {
        Error::Blob(e)
    }
}

impl<'a> Blob<'a> {
    /// Parses and validates a blob in place (typically a `static` in flash).
    ///
    /// # Errors
    /// [`Error::Blob`] for anything wrong with the container; the model
    /// validation errors of [`QModel::new`] otherwise.
    pub fn parse(bytes: &'a [u8]) -> Result<Self, Error> {
        if cfg!(target_endian = "big") {
            return Err(BlobError::BigEndianTarget.into());
        }
        if (bytes.as_ptr() as usize) % ALIGN != 0 {
            return Err(BlobError::Misaligned.into());
        }
        let header = parse_header(bytes)?;
        if header.total_len as usize != bytes.len() {
            return Err(BlobError::Length { header: header.total_len, got: bytes.len() }.into());
        }
        let n = header.sections as usize;
        if n > MAX_SECTIONS {
            return Err(BlobError::Header { field: "section count", value: n as u32 }.into());
        }
        let data_start = HEADER_LEN + n * ENTRY_LEN;
        let crc_at = bytes.len().checked_sub(4).filter(|c| *c >= data_start);
        let Some(crc_at) = crc_at else {
            return Err(BlobError::TooShort { need: data_start + 4, got: bytes.len() }.into());
        };
        let (body, tail) = bytes.split_at(crc_at);
        let stored = u32::from_le_bytes(tail.try_into().map_err(|_| BlobError::TooShort { need: 4, got: 0 })?);
        let computed = CRC.checksum(body);
        if stored != computed {
            return Err(BlobError::Crc { stored, computed }.into());
        }
        let mut found = Found { bytes, entries: [None; MAX_SECTIONS] };
        let mut end = data_start;
        for index in 0..n {
            let info = read_entry(bytes, index, header.scheme)?;
            let problem = |problem: &'static str| BlobError::Section { index, problem };
            let start = info.offset as usize;
            if start < end {
                return Err(problem("payload overlaps the table or the previous section (out of order)").into());
            }
            if body.get(end..start).is_some_and(|gap| gap.iter().any(|b| *b != 0)) {
                return Err(problem("padding before the payload is not zero").into());
            }
            end = start
                .checked_add(info.len as usize)
                .filter(|e| *e <= crc_at)
                .ok_or(problem("payload runs past the end"))?;
            if info.kind.per_layer() {
                if info.layer >= header.layers {
                    return Err(problem("layer index beyond the header's layer count").into());
                }
            } else if info.layer != 0 {
                return Err(problem("layer index must be 0 for a model section").into());
            }
            if HEAD_KINDS.contains(&info.kind) && !header.has_head {
                return Err(problem("head section in a blob without a head").into());
            }
            if DETECTOR_KINDS.contains(&info.kind) && !header.has_detector {
                return Err(problem("detector section in a blob without the detector flag").into());
            }
            let s = found.entries.get_mut(slot(info.kind, info.layer)).ok_or(problem("bad slot"))?;
            if s.is_some() {
                return Err(BlobError::Duplicate { kind: info.kind, layer: info.layer }.into());
            }
            *s = Some(info);
        }
        if body.get(end..).is_some_and(|gap| gap.iter().any(|b| *b != 0)) {
            return Err(BlobError::Section { index: n, problem: "bytes after the last payload are not zero" }.into());
        }

        let mut layers: heapless::Vec<QLayer<'a>, MAX_LAYERS> = heapless::Vec::new();
        let mut prev = header.input as u32;
        for k in 0..header.layers {
            let info = found.i32s(SectionKind::LayerInfo, k, 1, 4)?;
            let [x, h, frac, zero] = [0, 1, 2, 3].map(|i| info.get(i).copied().unwrap_or(-1));
            if x as u32 != prev || x <= 0 {
                return Err(BlobError::Dims {
                    what: "layer input (header X or previous H)",
                    expected: prev,
                    got: x as u32,
                }
                .into());
            }
            if !(1..=MAX_DIM as i32 / 4).contains(&h) {
                return Err(BlobError::Dims { what: "layer hidden size", expected: 1, got: h as u32 }.into());
            }
            if !(0..=header.cell.max_frac() as i32).contains(&frac) {
                return Err(
                    BlobError::LayerInfo { layer: k, problem: "cell fractional bits exceed the cell width" }.into()
                );
            }
            if zero != 0 {
                return Err(BlobError::LayerInfo { layer: k, problem: "reserved word is not 0" }.into());
            }
            let (xu, hu) = (x as u32, h as u32);
            let rows = 4 * hu;
            let w_x = found.weights(header.scheme, SectionKind::LayerWx, k, rows, xu)?;
            let w_h = found.weights(header.scheme, SectionKind::LayerWh, k, rows, hu)?;
            let bias = found.i32s(SectionKind::LayerBias, k, rows, 1)?;
            let rq_x = scales(&found, SectionKind::LayerRqXMult, SectionKind::LayerRqXShift, k, rows)?;
            let rq_h = scales(&found, SectionKind::LayerRqHMult, SectionKind::LayerRqHShift, k, rows)?;
            let layer = QLayer::new(xu as usize, hu as usize, w_x, w_h, bias, rq_x, rq_h, frac as u8)
                .map_err(|e| at_layer(e, k as usize))?;
            layers.push(layer).map_err(|_| Error::LayerCount { got: header.layers as usize })?;
            prev = hu;
        }
        let out = header.output as u32;
        let head = if header.has_head {
            let w = found.weights(header.scheme, SectionKind::HeadW, 0, out, prev)?;
            let bias = found.i32s(SectionKind::HeadBias, 0, out, 1)?;
            let rq = scales(&found, SectionKind::HeadRqMult, SectionKind::HeadRqShift, 0, out)?;
            Some(
                QHead::new(prev as usize, out as usize, w, bias, rq)
                    .map_err(|e| at_layer(e, header.layers as usize))?,
            )
        } else {
            if out != prev {
                return Err(
                    BlobError::Dims { what: "output count without a head (last H)", expected: prev, got: out }.into()
                );
            }
            None
        };
        let input_scale = found.f32s(SectionKind::InputScale, header.input as u32)?;
        let output_scale = found.f32s(SectionKind::OutputScale, out)?;
        for (kind, values) in [(SectionKind::InputScale, input_scale), (SectionKind::OutputScale, output_scale)] {
            if let Some(index) = values.iter().position(|v| !(v.is_finite() && *v > 0.0)) {
                return Err(BlobError::Scale { kind, index }.into());
            }
        }
        let model = QModel::new(&layers, head, header.scheme, header.cell, header.table)?;
        let words = state_words_for(layers.iter().map(|l| l.hidden()), header.scheme, header.cell);
        if words != header.state_words as usize {
            return Err(BlobError::Dims { what: "state words", expected: words as u32, got: header.state_words }.into());
        }
        let detector = if header.has_detector {
            if !header.has_head || out != header.input as u32 {
                return Err(BlobError::Dims {
                    what: "detector: head outputs (must predict every input)",
                    expected: header.input as u32,
                    got: if header.has_head { out } else { 0 },
                }
                .into());
            }
            let info = found.i32s(SectionKind::DetectorInfo, 0, 1, 8)?;
            let scales = found.i32s(SectionKind::DetectorScales, 0, header.input as u32, 4)?;
            let v = |i: usize| info.get(i).copied().unwrap_or(-1);
            if v(6) != 0 || v(7) != 0 {
                return Err(BlobError::Section { index: 0, problem: "detector info reserved words are not 0" }.into());
            }
            let small = |i: usize, what: &'static str| -> Result<u8, Error> {
                u8::try_from(v(i)).map_err(|_| Error::Format { what, value: v(i) })
            };
            let warmup = u32::try_from(v(0)).map_err(|_| Error::Format { what: "detector warm-up", value: v(0) })?;
            Some(Detector::new(
                header.input as usize,
                scales,
                warmup,
                small(1, "detector EWMA shift")?,
                small(2, "detector k of n")?,
                small(3, "detector window")?,
                v(4) as u32,
                v(5) as u32,
            )?)
        } else {
            None
        };
        Ok(Blob { header, bytes, model, input_scale, output_scale, detector })
    }

    /// The anomaly detector's parameters, when the blob carries them.
    pub fn detector(&self) -> Option<&Detector<'a>> {
        self.detector.as_ref()
    }

    /// The validated model, borrowing the blob's bytes.
    pub fn model(&self) -> &QModel<'a> {
        &self.model
    }

    /// The decoded header.
    pub fn header(&self) -> &Header {
        &self.header
    }

    /// Real value of one input LSB per feature (for a host or an FPU-equipped
    /// device that converts sensor units; the step never reads it).
    pub fn input_scale(&self) -> &'a [f32] {
        self.input_scale
    }

    /// Real value of one output LSB per output value.
    pub fn output_scale(&self) -> &'a [f32] {
        self.output_scale
    }

    /// Bytes of the whole blob.
    pub fn len(&self) -> usize {
        self.bytes.len()
    }

    /// Always false for a parsed blob (it has at least a header); here for
    /// completeness next to [`Blob::len`].
    pub fn is_empty(&self) -> bool {
        self.bytes.is_empty()
    }

    /// The section table entries, in order.
    pub fn sections(&self) -> impl Iterator<Item = SectionInfo> + 'a {
        let bytes = self.bytes;
        let scheme = self.header.scheme;
        (0..self.header.sections as usize).filter_map(move |i| read_entry(bytes, i, scheme).ok())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn crc_is_the_catalogue_crc32() {
        // CRC-32/ISO-HDLC check value from the CRC catalogue (Greg Cook's
        // "Catalogue of parametrised CRC algorithms"): 0xCBF43926 for "123456789".
        assert_eq!(CRC.checksum(b"123456789"), 0xCBF4_3926);
    }

    /// A 4-byte aligned copy of `b` (the parser refuses unaligned blobs).
    fn aligned(b: &[u8]) -> ([u32; 16], usize) {
        let mut w = [0u32; 16];
        let bytes: &mut [u8] = bytemuck::cast_slice_mut(&mut w);
        bytes[..b.len()].copy_from_slice(b);
        (w, b.len())
    }

    fn header() -> [u8; 32] {
        let mut h = [0u8; 32];
        h[..4].copy_from_slice(&MAGIC);
        h[4..6].copy_from_slice(&VERSION.to_le_bytes());
        h[6] = 32;
        h[11] = 1;
        h[12] = 4;
        h[14] = 4;
        h[16] = 1;
        h
    }

    #[test]
    fn header_fields_are_checked() {
        assert!(parse_header(&header()).is_ok());
        let cases: [(usize, u8, BlobError); 6] = [
            (0, b'X', BlobError::Magic),
            (4, 9, BlobError::Version { found: 9 }),
            (8, 7, BlobError::Header { field: "scheme", value: 7 }),
            (9, 2, BlobError::Header { field: "cell width", value: 2 }),
            (11, 5, BlobError::Header { field: "layer count", value: 5 }),
            (16, 4, BlobError::Header { field: "flags", value: 4 }),
        ];
        for (at, v, want) in cases {
            let mut h = header();
            h[at] = v;
            assert_eq!(parse_header(&h), Err(want), "byte {at} = {v}");
        }
        assert_eq!(parse_header(&header()[..31]), Err(BlobError::TooShort { need: 32, got: 31 }));
    }

    #[test]
    fn length_alignment_and_crc_are_checked_before_sections() {
        let mut b = [0u8; 36];
        b[..32].copy_from_slice(&header());
        b[20..24].copy_from_slice(&36u32.to_le_bytes());
        let crc = CRC.checksum(&b[..32]);
        b[32..].copy_from_slice(&crc.to_le_bytes());
        let (w, n) = aligned(&b);
        let bytes: &[u8] = &bytemuck::cast_slice(&w)[..n];
        // Valid container, but no sections: the first missing one is named.
        assert_eq!(
            Blob::parse(bytes).unwrap_err(),
            Error::Blob(BlobError::Missing { kind: SectionKind::LayerInfo, layer: 0 })
        );
        assert_eq!(Blob::parse(&bytes[..35]).unwrap_err(), Error::Blob(BlobError::Length { header: 36, got: 35 }));
        assert_eq!(Blob::parse(&bytes[1..]).unwrap_err(), Error::Blob(BlobError::Misaligned));
        let mut bad = b;
        bad[33] ^= 1;
        let (w, n) = aligned(&bad);
        assert!(matches!(Blob::parse(&bytemuck::cast_slice(&w)[..n]), Err(Error::Blob(BlobError::Crc { .. }))));
    }

    #[test]
    fn every_section_kind_round_trips_its_code() {
        for k in LAYER_KINDS.iter().chain(&HEAD_KINDS).chain(&MODEL_KINDS).chain(&DETECTOR_KINDS) {
            assert_eq!(SectionKind::from_u8(*k as u8), Some(*k));
        }
        assert_eq!(SectionKind::from_u8(0), None);
        assert_eq!(SectionKind::from_u8(200), None);
    }
}
