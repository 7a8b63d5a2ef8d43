//! Writing and loading device blobs (`.lwq`).
//!
//! The format is defined, and parsed, by the core ([`lapwing::model`]); this
//! module only serializes a [`QuantModelData`] into it and loads files into
//! 4-byte aligned memory so the core can borrow them in place, exactly as
//! the device does from flash.

use crate::quantize::{OwnedWeights, QuantModelData};
use anyhow::{bail, Context, Result};
use lapwing::model::{
    Blob, SectionKind, ALIGN, CRC, ENTRY_LEN, HEADER_LEN, HEAD_KINDS, LAYER_KINDS, MAGIC, MODEL_KINDS, VERSION,
};
use lapwing::quant::state_words_for;
use std::path::Path;

/// One section's payload, before layout.
struct Payload {
    kind: SectionKind,
    layer: u8,
    rows: u32,
    cols: u32,
    bytes: Vec<u8>,
}

fn i8_bytes(v: &[i8]) -> Vec<u8> {
    v.iter().map(|x| *x as u8).collect()
}

fn weight_bytes(w: &OwnedWeights) -> Vec<u8> {
    match w {
        OwnedWeights::I8(v) => i8_bytes(v),
        OwnedWeights::I16(v) => v.iter().flat_map(|x| x.to_le_bytes()).collect(),
    }
}

fn i32_bytes(v: &[i32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

fn f32_bytes(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

fn dim(v: usize, what: &str) -> Result<u32> {
    u32::try_from(v)
        .ok()
        .filter(|d| *d >= 1 && *d <= lapwing::model::MAX_DIM)
        .with_context(|| format!("{what} = {v} is outside what a blob can hold (1..={})", lapwing::model::MAX_DIM))
}

fn payloads(q: &QuantModelData) -> Result<Vec<Payload>> {
    let mut out = Vec::new();
    for (k, l) in q.layers.iter().enumerate() {
        let layer = u8::try_from(k).context("too many layers")?;
        let (x, h) = (dim(l.input, "layer input")?, dim(l.hidden, "hidden size")?);
        let rows = dim(4 * l.hidden, "4 * hidden size")?;
        for kind in LAYER_KINDS {
            let (r, c, bytes) = match kind {
                SectionKind::LayerInfo => (1, 4, i32_bytes(&[x as i32, h as i32, l.cell_frac as i32, 0])),
                SectionKind::LayerWx => (rows, x, weight_bytes(&l.w_x)),
                SectionKind::LayerWh => (rows, h, weight_bytes(&l.w_h)),
                SectionKind::LayerBias => (rows, 1, i32_bytes(&l.bias)),
                SectionKind::LayerRqXMult => (rows, 1, i32_bytes(&l.rq_x.mult)),
                SectionKind::LayerRqXShift => (rows, 1, i8_bytes(&l.rq_x.shift)),
                SectionKind::LayerRqHMult => (rows, 1, i32_bytes(&l.rq_h.mult)),
                SectionKind::LayerRqHShift => (rows, 1, i8_bytes(&l.rq_h.shift)),
                other => bail!("internal: {other:?} is not a layer section"),
            };
            out.push(Payload { kind, layer, rows: r, cols: c, bytes });
        }
    }
    if let Some(hd) = &q.head {
        let (y, h) = (dim(hd.output, "head outputs")?, dim(hd.input, "head input")?);
        for kind in HEAD_KINDS {
            let (r, c, bytes) = match kind {
                SectionKind::HeadW => (y, h, weight_bytes(&hd.w)),
                SectionKind::HeadBias => (y, 1, i32_bytes(&hd.bias)),
                SectionKind::HeadRqMult => (y, 1, i32_bytes(&hd.rq.mult)),
                SectionKind::HeadRqShift => (y, 1, i8_bytes(&hd.rq.shift)),
                other => bail!("internal: {other:?} is not a head section"),
            };
            out.push(Payload { kind, layer: 0, rows: r, cols: c, bytes });
        }
    }
    for kind in MODEL_KINDS {
        let v = if kind == SectionKind::InputScale { &q.input_scale } else { &q.output_scale };
        out.push(Payload { kind, layer: 0, rows: dim(v.len(), kind.name())?, cols: 1, bytes: f32_bytes(v) });
    }
    if let Some(d) = &q.detector {
        out.push(Payload { kind: SectionKind::DetectorInfo, layer: 0, rows: 1, cols: 8, bytes: i32_bytes(&d.info) });
        let x = dim(d.scales.len() / 4, "detector features")?;
        out.push(Payload {
            kind: SectionKind::DetectorScales,
            layer: 0,
            rows: x,
            cols: 4,
            bytes: i32_bytes(&d.scales),
        });
    }
    Ok(out)
}

fn align_up(n: usize) -> usize {
    n.div_ceil(ALIGN) * ALIGN
}

/// Serializes a quantized model into blob bytes (format version
/// [`VERSION`]). The result parses with [`Blob::parse`]; this is checked
/// before returning.
///
/// # Errors
/// Dimensions the format cannot hold, or a model the core refuses.
pub fn encode(q: &QuantModelData) -> Result<Vec<u8>> {
    q.view().context("the quantized model is invalid")?;
    let sections = payloads(q)?;
    for s in &sections {
        let size = s.kind.elem(q.scheme).size() * s.rows as usize * s.cols as usize;
        if size != s.bytes.len() {
            bail!("internal: section {} has {} bytes, dims say {size}", s.kind.name(), s.bytes.len());
        }
    }
    let table_end = HEADER_LEN + sections.len() * ENTRY_LEN;
    let mut offsets = Vec::with_capacity(sections.len());
    let mut at = align_up(table_end);
    for s in &sections {
        offsets.push(at);
        at = align_up(at + s.bytes.len());
    }
    let total = at + 4;
    let output = q.output_scale.len();
    let mut b = Vec::with_capacity(total);
    b.extend_from_slice(&MAGIC);
    b.extend_from_slice(&VERSION.to_le_bytes());
    b.extend_from_slice(&(HEADER_LEN as u16).to_le_bytes());
    b.push(q.scheme as u8);
    b.push(q.cell as u8);
    b.push(q.table as u8);
    b.push(u8::try_from(q.layers.len()).context("too many layers")?);
    b.extend_from_slice(&u16::try_from(q.input_scale.len()).context("too many inputs")?.to_le_bytes());
    b.extend_from_slice(&u16::try_from(output).context("too many outputs")?.to_le_bytes());
    b.push(u8::from(q.head.is_some()) | (u8::from(q.detector.is_some()) << 1));
    b.push(0);
    b.extend_from_slice(&u16::try_from(sections.len()).context("too many sections")?.to_le_bytes());
    b.extend_from_slice(&u32::try_from(total).context("blob larger than 4 GiB")?.to_le_bytes());
    let words = state_words_for(q.layers.iter().map(|l| l.hidden), q.scheme, q.cell);
    b.extend_from_slice(&u32::try_from(words).context("state too large")?.to_le_bytes());
    b.extend_from_slice(&0u32.to_le_bytes());
    for (s, off) in sections.iter().zip(&offsets) {
        b.push(s.kind as u8);
        b.push(s.layer);
        b.push(s.kind.elem(q.scheme) as u8);
        b.push(0);
        for v in [s.rows, s.cols, *off as u32, s.bytes.len() as u32] {
            b.extend_from_slice(&v.to_le_bytes());
        }
    }
    for (s, off) in sections.iter().zip(&offsets) {
        b.resize(*off, 0);
        b.extend_from_slice(&s.bytes);
    }
    b.resize(at, 0);
    let crc = CRC.checksum(&b);
    b.extend_from_slice(&crc.to_le_bytes());
    let aligned = AlignedBytes::from_bytes(&b);
    Blob::parse(aligned.bytes()).map_err(|e| anyhow::anyhow!("internal: the encoded blob does not parse: {e}"))?;
    Ok(b)
}

/// Bytes held in 4-byte aligned storage, as the core's parser requires.
#[derive(Clone, Debug)]
pub struct AlignedBytes {
    words: Vec<u32>,
    len: usize,
}

impl AlignedBytes {
    /// Copies `b` into aligned storage.
    pub fn from_bytes(b: &[u8]) -> Self {
        let mut words = vec![0u32; b.len().div_ceil(4)];
        for (w, chunk) in words.iter_mut().zip(b.chunks(4)) {
            let mut le = [0u8; 4];
            for (d, s) in le.iter_mut().zip(chunk) {
                *d = *s;
            }
            *w = u32::from_ne_bytes(le);
        }
        AlignedBytes { words, len: b.len() }
    }

    /// The bytes, starting at a 4-byte aligned address.
    pub fn bytes(&self) -> &[u8] {
        let all: &[u8] = bytemuck_bytes(&self.words);
        all.get(..self.len).unwrap_or(all)
    }
}

fn bytemuck_bytes(w: &[u32]) -> &[u8] {
    // u32 -> u8 casts are always valid (alignment only decreases).
    bytemuck::cast_slice(w)
}

/// Largest blob file [`LoadedBlob::read`] loads (64 MiB, far beyond any
/// microcontroller's flash): a larger file is refused before it is read.
pub const MAX_BLOB_FILE_BYTES: u64 = 64 << 20;

/// A blob file loaded into aligned memory.
#[derive(Clone, Debug)]
pub struct LoadedBlob {
    /// Where it came from.
    pub path: std::path::PathBuf,
    data: AlignedBytes,
}

impl LoadedBlob {
    /// Reads a `.lwq` file and validates it with the core's parser.
    ///
    /// # Errors
    /// The file cannot be read, is larger than [`MAX_BLOB_FILE_BYTES`], or
    /// the parser refuses it (the message names the file and the check that
    /// failed).
    pub fn read(path: &Path) -> Result<Self> {
        let len = std::fs::metadata(path).with_context(|| format!("{}: cannot read", path.display()))?.len();
        if len > MAX_BLOB_FILE_BYTES {
            bail!(
                "{}: not a valid blob: the file has {len} bytes, more than the {MAX_BLOB_FILE_BYTES} a blob may have",
                path.display()
            );
        }
        let raw = std::fs::read(path).with_context(|| format!("{}: cannot read", path.display()))?;
        let me = LoadedBlob { path: path.to_path_buf(), data: AlignedBytes::from_bytes(&raw) };
        me.parse()?;
        Ok(me)
    }

    /// The parsed view (cheap: validation and CRC are re-run).
    ///
    /// # Errors
    /// As [`LoadedBlob::read`].
    pub fn parse(&self) -> Result<Blob<'_>> {
        Blob::parse(self.data.bytes()).map_err(|e| anyhow::anyhow!("{}: not a valid blob: {e}", self.path.display()))
    }

    /// The raw bytes.
    pub fn bytes(&self) -> &[u8] {
        self.data.bytes()
    }
}
