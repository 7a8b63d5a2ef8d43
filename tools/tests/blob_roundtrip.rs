//! The device blob end to end on the host: float model -> quantize -> blob
//! bytes -> the core's zero-copy parser -> step, bit-identical to the
//! in-memory quantized model; and every corruption refused without a panic.

use lapwing::activation::TableKind;
use lapwing::model::{Blob, CRC};
use lapwing::quant::{CellWidth, Scheme};
use lapwing_tools::blob::{encode, AlignedBytes};
use lapwing_tools::calibrate::observe;
use lapwing_tools::quantize::{quantize, QuantModelData, QuantOptions};
use lapwing_tools::synth::{random_model, random_walk, ModelSpec};
use proptest::prelude::*;

fn quantized(spec: &ModelSpec, seed: u64, cell: CellWidth, table: TableKind) -> QuantModelData {
    quantized_as(spec, seed, Scheme::W8A16, cell, table)
}

fn quantized_as(spec: &ModelSpec, seed: u64, scheme: Scheme, cell: CellWidth, table: TableKind) -> QuantModelData {
    let m = random_model(spec, seed);
    let calib = random_walk(spec.input, 2_000, seed + 1);
    let ranges = observe(&m, &calib).expect("calibration");
    quantize(&m, &ranges, &QuantOptions { scheme, cell, table, ..Default::default() }).expect("quantize")
}

fn run_model(model: &lapwing::quant::QModel<'_>, inputs: &[Vec<i16>]) -> Vec<Vec<i16>> {
    let mut state = vec![0i16; model.state_words()];
    let mut out = vec![0i16; model.output_len()];
    inputs
        .iter()
        .map(|x| {
            model.step(&mut state, x, &mut out).expect("step");
            out.clone()
        })
        .collect()
}

fn small_blob() -> Vec<u8> {
    let spec = ModelSpec { input: 2, hidden: 3, layers: 2, output: Some(2), gain: 1.0 };
    encode(&quantized(&spec, 5, CellWidth::C16, TableKind::Standard)).expect("encode")
}

#[test]
fn blob_steps_are_bit_identical_to_the_in_memory_model() {
    let specs = [
        (
            ModelSpec { input: 4, hidden: 32, layers: 1, output: Some(4), gain: 1.0 },
            CellWidth::C16,
            TableKind::Standard,
        ),
        (ModelSpec { input: 3, hidden: 8, layers: 2, output: None, gain: 2.0 }, CellWidth::C32, TableKind::Compact),
        (ModelSpec { input: 1, hidden: 5, layers: 3, output: Some(1), gain: 1.5 }, CellWidth::C32, TableKind::Standard),
    ];
    let cases = specs.iter().flat_map(|(sp, c, t)| Scheme::ALL.map(|s| (sp, s, *c, *t)));
    for (i, (spec, scheme, cell, table)) in cases.enumerate() {
        let q = quantized_as(spec, 10 + i as u64, scheme, cell, table);
        let bytes = encode(&q).expect("encode");
        let data = random_walk(spec.input, 3_000, 99 + i as u64);
        let ints: Vec<Vec<i16>> = data.iter().map(|x| q.quantize_input(x)).collect();
        let mem = run_model(&q.view().expect("view"), &ints);
        let aligned = AlignedBytes::from_bytes(&bytes);
        let blob = Blob::parse(aligned.bytes()).expect("parse");
        assert_eq!(blob.input_scale(), q.input_scale.as_slice());
        assert_eq!(blob.output_scale(), q.output_scale.as_slice());
        assert_eq!(blob.model().state_words(), q.view().expect("view").state_words());
        let dev = run_model(blob.model(), &ints);
        assert_eq!(mem, dev, "case {i} ({}): blob and in-memory model differ", scheme.name());
        assert_eq!(blob.model().scheme(), scheme);
        // Deterministic encoding: the same model gives the same bytes.
        assert_eq!(encode(&q).expect("encode"), bytes);
    }
}

#[test]
fn every_single_byte_change_and_truncation_is_rejected() {
    let good = small_blob();
    assert!(Blob::parse(AlignedBytes::from_bytes(&good).bytes()).is_ok());
    for i in 0..good.len() {
        for flip in [0x01u8, 0x80, 0xFF] {
            let mut b = good.clone();
            b[i] ^= flip;
            let a = AlignedBytes::from_bytes(&b);
            assert!(Blob::parse(a.bytes()).is_err(), "byte {i} ^ {flip:#x} accepted");
        }
    }
    for n in 0..good.len() {
        let a = AlignedBytes::from_bytes(&good[..n]);
        assert!(Blob::parse(a.bytes()).is_err(), "truncation to {n} bytes accepted");
    }
}

/// Re-seals a mutated blob with a correct CRC, so the structural checks
/// behind the CRC are exercised too.
fn reseal(b: &mut [u8]) {
    let n = b.len();
    if n >= 4 {
        let crc = CRC.checksum(&b[..n - 4]);
        b[n - 4..].copy_from_slice(&crc.to_le_bytes());
    }
}

fn check_never_panics(b: &[u8]) {
    let a = AlignedBytes::from_bytes(b);
    if let Ok(blob) = Blob::parse(a.bytes()) {
        // Accepted: a step with buffers of the stated sizes must succeed.
        let m = blob.model();
        let mut state = vec![0i16; m.state_words()];
        let mut out = vec![0i16; m.output_len()];
        let x = vec![12_345i16; m.input_len()];
        m.step(&mut state, &x, &mut out).expect("a parsed blob never fails a step");
    };
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(2000))]

    #[test]
    fn random_bytes_never_panic(b in prop::collection::vec(any::<u8>(), 0..600)) {
        check_never_panics(&b);
    }

    #[test]
    fn resealed_mutations_are_validated(edits in prop::collection::vec((any::<prop::sample::Index>(), any::<u8>()), 1..4)) {
        let mut b = small_blob();
        for (at, v) in &edits {
            let i = at.index(b.len());
            b[i] = *v;
        }
        reseal(&mut b);
        check_never_panics(&b);
    }

    #[test]
    fn resealed_header_and_table_edits_are_validated(at in 0usize..300, v in any::<u8>()) {
        // Concentrate on the header and section table, where a wrong value
        // changes the structure rather than a weight.
        let mut b = small_blob();
        let i = at.min(b.len() - 5);
        b[i] = v;
        reseal(&mut b);
        check_never_panics(&b);
    }
}

/// Finds a section's payload offset in a valid blob.
fn section_offset(bytes: &[u8], kind: lapwing::model::SectionKind, layer: u8) -> usize {
    let a = AlignedBytes::from_bytes(bytes);
    let blob = Blob::parse(a.bytes()).expect("valid");
    let s = blob.sections().find(|s| s.kind == kind && s.layer == layer).expect("section");
    s.offset as usize
}

#[test]
fn resealed_bad_values_get_their_own_errors() {
    use lapwing::model::{BlobError, SectionKind};
    use lapwing::Error;
    let good = small_blob();
    let parse = |b: &[u8]| Blob::parse(AlignedBytes::from_bytes(b).bytes()).map(|_| ()).unwrap_err();
    // A zero, negative or NaN scale (found in review: `run` printed NaN).
    for (kind, v) in
        [(SectionKind::InputScale, 0.0f32), (SectionKind::OutputScale, f32::NAN), (SectionKind::InputScale, -1.0)]
    {
        let mut b = good.clone();
        let at = section_offset(&good, kind, 0) + 4;
        b[at..at + 4].copy_from_slice(&v.to_le_bytes());
        reseal(&mut b);
        assert_eq!(parse(&b), Error::Blob(BlobError::Scale { kind, index: 1 }), "{kind:?} = {v}");
    }
    // Layer 1's cell format beyond c16's 15 bits names layer 1.
    let mut b = good.clone();
    let at = section_offset(&good, SectionKind::LayerInfo, 1) + 8;
    b[at..at + 4].copy_from_slice(&40i32.to_le_bytes());
    reseal(&mut b);
    assert!(matches!(parse(&b), Error::Blob(BlobError::LayerInfo { layer: 1, .. })), "{}", parse(&b));
    // A section count beyond the format's maximum is refused before any
    // arithmetic on it.
    let mut b = good.clone();
    b[18..20].copy_from_slice(&u16::MAX.to_le_bytes());
    reseal(&mut b);
    assert_eq!(parse(&b), Error::Blob(BlobError::Header { field: "section count", value: 65535 }));
}

#[test]
fn detector_parameters_round_trip_and_are_validated() {
    use lapwing::model::SectionKind;
    use lapwing_tools::detector::{to_fixed, DetectorParams};
    // A next-step predictor shape: the head predicts every input.
    let spec = ModelSpec { input: 3, hidden: 6, layers: 1, output: Some(3), gain: 1.0 };
    let mut q = quantized(&spec, 21, CellWidth::C16, TableKind::Standard);
    let p = DetectorParams {
        spread: vec![0.1, 0.2, 0.3],
        raise: 9.0,
        clear: 4.5,
        warmup: 50,
        ewma_shift: 3,
        k_of: 2,
        window: 4,
    };
    q.detector = Some(to_fixed(&p, &q.input_scale, &q.output_scale).unwrap());
    let bytes = encode(&q).unwrap();
    let a = AlignedBytes::from_bytes(&bytes);
    let blob = Blob::parse(a.bytes()).unwrap();
    let d = blob.detector().expect("detector present");
    assert_eq!(d.settings(), (50, 3, 2, 4, 9 << 16, (4.5 * 65536.0) as u32));
    // k greater than n, resealed: refused by the core's detector validation.
    let mut b = bytes.clone();
    let at = section_offset(&bytes, SectionKind::DetectorInfo, 0) + 8;
    b[at..at + 4].copy_from_slice(&9i32.to_le_bytes());
    reseal(&mut b);
    assert!(Blob::parse(AlignedBytes::from_bytes(&b).bytes()).is_err());
    // A detector on a model whose head does not predict every input: refused.
    let spec = ModelSpec { input: 3, hidden: 6, layers: 1, output: Some(2), gain: 1.0 };
    let mut q2 = quantized(&spec, 22, CellWidth::C16, TableKind::Standard);
    q2.detector = q.detector.clone();
    assert!(encode(&q2).is_err());
}
