//! What is in a blob: scheme, dimensions, every section with its bytes, and
//! the footprint on the device (flash, RAM, work per step).

use lapwing::model::Blob;
use serde::Serialize;
use std::fmt::Write as _;

/// One section as listed by `inspect`.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct SectionRow {
    /// Layer index for layer sections, `None` for head and model sections.
    pub layer: Option<u8>,
    /// Section name (`w_x`, `head.w`, ...).
    pub name: String,
    /// Element type.
    pub elem: String,
    /// `[rows, cols]`.
    pub dims: [u32; 2],
    /// Offset in the blob.
    pub offset: u32,
    /// Payload bytes.
    pub bytes: u32,
}

/// One layer's shape.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct LayerRow {
    /// Input features.
    pub input: usize,
    /// Hidden units.
    pub hidden: usize,
    /// Cell format: fractional bits.
    pub cell_frac: u8,
}

/// Footprint on the device.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct Footprint {
    /// The blob (weights, scales, header, table of sections, CRC).
    pub blob_bytes: usize,
    /// The activation table compiled into the core.
    pub table_bytes: usize,
    /// Blob plus table: model data in flash (code not included).
    pub flash_bytes: usize,
    /// Caller-owned state, scratch included (`state_words * 2`).
    pub ram_bytes: usize,
    /// `int16` words of state.
    pub state_words: usize,
    /// Multiply-accumulates per step.
    pub macs_per_step: usize,
}

/// Everything `inspect` reports.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct Inspection {
    /// Format version.
    pub version: u16,
    /// Scheme name (`w8a16`).
    pub scheme: String,
    /// `c16` or `c32`.
    pub cell: String,
    /// Activation table name.
    pub table: String,
    /// Input features X.
    pub inputs: usize,
    /// Output values.
    pub outputs: usize,
    /// Whether a dense head is present.
    pub head: bool,
    /// Layers.
    pub layers: Vec<LayerRow>,
    /// Sections in blob order.
    pub sections: Vec<SectionRow>,
    /// Device footprint.
    pub footprint: Footprint,
}

/// Describes a parsed blob.
pub fn inspect(blob: &Blob<'_>) -> Inspection {
    let m = blob.model();
    let h = blob.header();
    let table_bytes = m.table_kind().flash_bytes();
    Inspection {
        version: lapwing::model::VERSION,
        scheme: h.scheme.name().to_string(),
        cell: h.cell.name().to_string(),
        table: m.table_kind().name().to_string(),
        inputs: m.input_len(),
        outputs: m.output_len(),
        head: h.has_head,
        layers: m
            .layers()
            .iter()
            .map(|l| LayerRow { input: l.input(), hidden: l.hidden(), cell_frac: l.cell_frac() })
            .collect(),
        sections: blob
            .sections()
            .map(|s| SectionRow {
                layer: s.kind.per_layer().then_some(s.layer),
                name: s.kind.name().to_string(),
                elem: s.elem.name().to_string(),
                dims: [s.rows, s.cols],
                offset: s.offset,
                bytes: s.len,
            })
            .collect(),
        footprint: Footprint {
            blob_bytes: blob.len(),
            table_bytes,
            flash_bytes: blob.len() + table_bytes,
            ram_bytes: 2 * m.state_words(),
            state_words: m.state_words(),
            macs_per_step: m.macs_per_step(),
        },
    }
}

impl Inspection {
    /// A readable multi-line description.
    pub fn to_text(&self) -> String {
        let mut s = String::new();
        let dims: Vec<String> = self.layers.iter().map(|l| format!("{}->{}", l.input, l.hidden)).collect();
        let _ = writeln!(
            s,
            "scheme {} {} (table {}), format v{}; {} layer(s) {}; inputs {}, outputs {}{}",
            self.scheme,
            self.cell,
            self.table,
            self.version,
            self.layers.len(),
            dims.join(", "),
            self.inputs,
            self.outputs,
            if self.head { " (dense head)" } else { " (last hidden state, no head)" }
        );
        for (k, l) in self.layers.iter().enumerate() {
            let _ = writeln!(s, "layer {k}: X = {}, H = {}, cell Q.{}", l.input, l.hidden, l.cell_frac);
        }
        let _ = writeln!(
            s,
            "\n{:<8} {:<14} {:<5} {:>12} {:>8} {:>8}",
            "layer", "section", "type", "dims", "offset", "bytes"
        );
        for r in &self.sections {
            let layer = r.layer.map_or("-".to_string(), |l| l.to_string());
            let dims = format!("{}x{}", r.dims[0], r.dims[1]);
            let _ = writeln!(s, "{layer:<8} {:<14} {:<5} {dims:>12} {:>8} {:>8}", r.name, r.elem, r.offset, r.bytes);
        }
        let f = &self.footprint;
        let _ = writeln!(
            s,
            "\nflash: {} B model data = {} B blob + {} B activation table",
            f.flash_bytes, f.blob_bytes, f.table_bytes
        );
        let _ = writeln!(s, "RAM:   {} B state ({} int16 words: hidden, cell, scratch)", f.ram_bytes, f.state_words);
        let _ = writeln!(s, "work:  {} multiply-accumulates per step", f.macs_per_step);
        s
    }
}
