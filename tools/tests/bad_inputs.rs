//! The bad-input corpus: every subcommand against missing, empty, truncated
//! and malformed files, impossible shapes and sizes, bad data and budget
//! files, and outputs it cannot write. Every case must end with exit status
//! 2, one line naming the file and the problem, and no output file created
//! or changed (`common::refuses_all`). The files are made here, in a
//! temporary directory, from the shipped example; `pipeline_cli.rs` and
//! `cli.rs` hold the cases that came with those commands.

mod common;

use common::*;
use lapwing::model::CRC;
use std::path::{Path, PathBuf};

/// A temporary directory with the shipped model and data, a good blob made
/// from them, and one with a detector.
struct Fx {
    dir: tempfile::TempDir,
    model: String,
    data: String,
    blob: String,
    det_blob: String,
    det_data: String,
}

impl Fx {
    fn new() -> Fx {
        let dir = tempfile::tempdir().unwrap();
        let model = example("lstm_x4_h16.safetensors");
        let data = example("signal.csv");
        let blob = dir.path().join("good.lwq").display().to_string();
        run_ok(&["quantize", &model, "--calib", &data, "-o", &blob]);
        // The shipped next-step predictor with a detector, on 2,000 rows of
        // the demo sample (features then a label column).
        let sample = std::fs::read_to_string(root().join("demo-data/sample.csv")).unwrap();
        let det_data = dir.path().join("det.csv");
        std::fs::write(&det_data, sample.lines().take(2001).collect::<Vec<_>>().join("\n") + "\n").unwrap();
        let det_data = det_data.display().to_string();
        let det_blob = dir.path().join("det.lwq").display().to_string();
        let demo_model = root().join("demo-data/model.safetensors").display().to_string();
        run_ok(&["quantize", &demo_model, "--calib", &det_data, "--detector", "-o", &det_blob]);
        Fx { dir, model, data, blob, det_blob, det_data }
    }

    fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }

    /// Writes `bytes` to `name` in the directory; returns the path.
    fn file(&self, name: &str, bytes: impl AsRef<[u8]>) -> String {
        let p = self.path(name);
        std::fs::write(&p, bytes).unwrap();
        p.display().to_string()
    }

    /// The good blob's bytes after `edit`, with the CRC re-sealed when
    /// `seal` (so the structural check behind it is what refuses them).
    fn blob_with(&self, name: &str, seal: bool, edit: impl FnOnce(&mut Vec<u8>)) -> String {
        let mut b = std::fs::read(&self.blob).unwrap();
        edit(&mut b);
        if seal {
            let n = b.len();
            let crc = CRC.checksum(&b[..n - 4]);
            b[n - 4..].copy_from_slice(&crc.to_le_bytes());
        }
        self.file(name, b)
    }
}

fn run_ok(args: &[&str]) {
    let o = lapwing(args);
    assert!(o.status.success(), "{args:?}: {}", stderr(&o));
}

fn s(p: &Path) -> String {
    p.display().to_string()
}

/// A `.npy` v1.0 file's bytes: preamble, header dict padded to 64 bytes, data.
fn npy(descr: &str, shape: &str, data: &[u8]) -> Vec<u8> {
    let mut dict = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape}, }}");
    while (10 + dict.len() + 1) % 64 != 0 {
        dict.push(' ');
    }
    dict.push('\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend_from_slice(&u16::try_from(dict.len()).unwrap().to_le_bytes());
    out.extend_from_slice(dict.as_bytes());
    out.extend_from_slice(data);
    out
}

/// A one-entry stored (uncompressed) zip archive: `name` holding `data`.
fn zip_one(name: &str, data: &[u8]) -> Vec<u8> {
    // Zip's CRC-32 is the blob's CRC-32/ISO-HDLC.
    let crc = CRC.checksum(data);
    let (n, len) = (name.len() as u16, data.len() as u32);
    let mut z = Vec::new();
    let local = |z: &mut Vec<u8>| {
        z.extend_from_slice(&[0x50, 0x4b, 0x03, 0x04, 20, 0, 0, 0, 0, 0, 0, 0, 0, 0]);
        z.extend_from_slice(&crc.to_le_bytes());
        z.extend_from_slice(&len.to_le_bytes());
        z.extend_from_slice(&len.to_le_bytes());
        z.extend_from_slice(&n.to_le_bytes());
        z.extend_from_slice(&0u16.to_le_bytes());
        z.extend_from_slice(name.as_bytes());
    };
    local(&mut z);
    z.extend_from_slice(data);
    let cd_at = z.len() as u32;
    z.extend_from_slice(&[0x50, 0x4b, 0x01, 0x02, 20, 0, 20, 0, 0, 0, 0, 0, 0, 0, 0, 0]);
    z.extend_from_slice(&crc.to_le_bytes());
    z.extend_from_slice(&len.to_le_bytes());
    z.extend_from_slice(&len.to_le_bytes());
    z.extend_from_slice(&n.to_le_bytes());
    z.extend_from_slice(&[0; 12]);
    z.extend_from_slice(&0u32.to_le_bytes());
    z.extend_from_slice(name.as_bytes());
    let cd_len = z.len() as u32 - cd_at;
    z.extend_from_slice(&[0x50, 0x4b, 0x05, 0x06, 0, 0, 0, 0, 1, 0, 1, 0]);
    z.extend_from_slice(&cd_len.to_le_bytes());
    z.extend_from_slice(&cd_at.to_le_bytes());
    z.extend_from_slice(&0u16.to_le_bytes());
    z
}

#[test]
fn every_subcommand_refuses_a_missing_input_file() {
    let fx = Fx::new();
    let out = fx.path("out.file");
    let o = s(&out);
    let (m, d, b) = (fx.model.as_str(), fx.data.as_str(), fx.blob.as_str());
    let cases: Vec<Vec<&str>> = vec![
        vec!["fit", "--train", "absent.csv", "-o", &o],
        vec!["quantize", "absent.safetensors", "--calib", d, "-o", &o],
        vec!["quantize", m, "--calib", "absent.csv", "-o", &o],
        vec!["run", "absent.lwq", "--data", d, "-o", &o],
        vec!["run", "absent.npz", "--data", d, "-o", &o],
        vec!["run", b, "--data", "absent.npy", "-o", &o],
        vec!["report", "absent.lwq", "--float", m, "--data", d, "--json", &o],
        vec!["report", b, "--float", "absent.safetensors", "--data", d, "--json", &o],
        vec!["report", b, "--float", m, "--data", "absent.csv", "--json", &o],
        vec!["report", b, "--float", m, "--data", d, "--budget", "absent.toml", "--json", &o],
        vec!["sweep", "absent.safetensors", "--calib", d, "--data", d, "--json", &o],
        vec!["sweep", m, "--calib", d, "--data", "absent.csv", "--json", &o],
        vec!["sweep", m, "--calib", d, "--data", d, "--budget", "absent.toml", "--json", &o],
        vec!["inspect", "absent.lwq"],
        vec!["detect", "absent.lwq", "--data", d, "--json", &o],
        vec!["detect", &fx.det_blob, "--data", "absent.csv", "--json", &o],
        vec!["codegen", "absent.lwq", "-o", &o],
        vec!["simulate", "absent.toml", "-o", &o],
    ];
    for args in &cases {
        refuses(args, &out, &["absent."]);
    }
    // demo: a demo-data directory that does not exist, named with its file.
    let demo_out = fx.path("demo-out");
    refuses(&["demo", "--demo-data", &s(&fx.path("absent")), "--out", &s(&demo_out)], &demo_out, &["absent"]);
}

#[test]
fn empty_and_truncated_files() {
    let fx = Fx::new();
    let out = fx.path("out.file");
    let o = s(&out);
    let d = fx.data.as_str();
    let cases: [(&str, &[u8], &str); 6] = [
        ("empty.safetensors", b"", "the file is empty"),
        ("short.safetensors", b"\x10\x00\x00", "shorter than the 8-byte header length"),
        ("empty.npz", b"", "not a valid .npz"),
        ("empty.csv", b"", "no data rows"),
        ("empty.npy", b"", "the file is empty"),
        ("empty.lwq", b"", "truncated"),
    ];
    for (name, bytes, why) in cases {
        let p = fx.file(name, bytes);
        let args: Vec<&str> = match name.rsplit('.').next().unwrap() {
            "safetensors" | "npz" => vec!["quantize", &p, "--calib", d, "-o", &o],
            "lwq" => vec!["run", &p, "--data", d, "-o", &o],
            _ => vec!["quantize", &fx.model, "--calib", &p, "-o", &o],
        };
        refuses(&args, &out, &[name, why]);
    }
    // Truncated float model: the header describes more than the file holds.
    let full = std::fs::read(&fx.model).unwrap();
    let t = fx.file("cut.safetensors", &full[..full.len() - 100]);
    refuses(&["run", &t, "--data", d, "-o", &o], &out, &["cut.safetensors", "truncated"]);
    let t = fx.file("head.safetensors", &full[..100]);
    refuses(&["report", &fx.blob, "--float", &t, "--data", d, "--json", &o], &out, &["head.safetensors", "truncated"]);
    // Truncated npz: the end of the archive is missing.
    let npz = std::fs::read(root().join("tests/data/layouts/x4_h16_l2_fused.npz")).unwrap();
    let t = fx.file("cut.npz", &npz[..npz.len() / 2]);
    refuses(&["sweep", &t, "--calib", d, "--data", d, "--json", &o], &out, &["cut.npz", "not a valid .npz"]);
    // Truncated .npy data: the header promises more rows than follow.
    let t = fx.file("cut.npy", npy("<f4", "(100, 4)", &[0; 40]));
    refuses(&["run", &fx.blob, "--data", &t, "-o", &o], &out, &["cut.npy", "truncated", "1600 bytes"]);
    // Truncated blob, for every command that reads one.
    let full = std::fs::read(&fx.blob).unwrap();
    let t = fx.file("cut.lwq", &full[..full.len() / 3]);
    for args in [
        vec!["inspect", &t],
        vec!["codegen", &t, "-o", &o],
        vec!["report", &t, "--float", &fx.model, "--data", d, "--json", &o],
        vec!["detect", &t, "--data", d, "--json", &o],
    ] {
        refuses(&args, &out, &["cut.lwq", "not a valid blob"]);
    }
}

#[test]
fn blob_header_corruptions() {
    let fx = Fx::new();
    let out = fx.path("out.file");
    let o = s(&out);
    let d = fx.data.as_str();
    let magic = fx.blob_with("magic.lwq", false, |b| b[..4].copy_from_slice(b"LPWX"));
    let version = fx.blob_with("version.lwq", true, |b| b[4..6].copy_from_slice(&2u16.to_le_bytes()));
    let crc = fx.blob_with("crc.lwq", false, |b| {
        let n = b.len();
        b[n - 1] ^= 1;
    });
    // The first section claims 2^32 - 1 rows; the CRC is valid.
    let huge = fx.blob_with("huge.lwq", true, |b| b[36..40].copy_from_slice(&u32::MAX.to_le_bytes()));
    // The header claims 200 layers and 2^16 - 1 inputs.
    let layers = fx.blob_with("layers.lwq", true, |b| b[11] = 200);
    let inputs = fx.blob_with("inputs.lwq", true, |b| b[12..14].copy_from_slice(&u16::MAX.to_le_bytes()));
    // Total length field beyond the file.
    let total = fx.blob_with("total.lwq", true, |b| b[20..24].copy_from_slice(&u32::MAX.to_le_bytes()));
    for (p, why) in [
        (&magic, "magic"),
        (&version, "version"),
        (&crc, "CRC"),
        (&huge, "not a valid blob"),
        (&layers, "not a valid blob"),
        (&inputs, "not a valid blob"),
        (&total, "not a valid blob"),
    ] {
        let name = Path::new(p).file_name().unwrap().to_str().unwrap();
        for args in [
            vec!["inspect", p, "--json"],
            vec!["codegen", p, "-o", &o],
            vec!["run", p, "--data", d, "-o", &o],
            vec!["report", p, "--float", &fx.model, "--data", d, "--json", &o],
            vec!["detect", p, "--data", d, "--json", &o],
        ] {
            refuses(&args, &out, &[name, why]);
        }
    }
    // A 100 MiB (sparse) file is refused from its size, before it is read.
    let big = fx.path("big.lwq");
    std::fs::File::create(&big).unwrap().set_len(100 << 20).unwrap();
    for args in [vec!["inspect", &s(&big)], vec!["run", &s(&big), "--data", d, "-o", &o]] {
        refuses(&args, &out, &["big.lwq", "104857600 bytes"]);
    }
    // A float model handed to a command that needs a blob.
    refuses(&["inspect", &fx.model], &out, &["lstm_x4_h16.safetensors", "not a valid blob"]);
    // A blob without a detector handed to detect.
    refuses(&["detect", &fx.blob, "--data", d, "--json", &o], &out, &["good.lwq", "no detector"]);
}

#[test]
fn float_models_with_bad_values_or_shapes() {
    let fx = Fx::new();
    let out = fx.path("out.file");
    let o = s(&out);
    let (d, b) = (fx.data.as_str(), fx.blob.as_str());
    let dir = fx.dir.path();
    let inf = write_model(dir, "inf.safetensors", |t| {
        t.iter_mut().find(|x| x.0 == "rnn.bias_ih_l0").unwrap().2[5] = f32::NEG_INFINITY;
    });
    let nan_head = write_model(dir, "nanhead.safetensors", |t| {
        t.iter_mut().find(|x| x.0 == "proj.weight").unwrap().2[0] = f32::NAN;
    });
    // 63 gate rows: not four gates of equal size.
    let gates = write_model(dir, "gates.safetensors", |t| {
        let w = t.iter_mut().find(|x| x.0 == "rnn.weight_ih_l0").unwrap();
        w.1 = vec![63, 4];
        w.2.truncate(63 * 4);
    });
    // Layer 1 reads 15 inputs while layer 0 gives 16.
    let disagree = write_model(dir, "disagree.safetensors", |t| {
        let w = t.iter_mut().find(|x| x.0 == "rnn.weight_ih_l1").unwrap();
        w.1 = vec![64, 15];
        w.2.truncate(64 * 15);
    });
    let models = [
        (&inf, vec!["inf.safetensors", "rnn.bias_ih_l0", "inf"]),
        (&nan_head, vec!["nanhead.safetensors", "proj.weight", "NaN"]),
        (&gates, vec!["gates.safetensors", "63"]),
        (&disagree, vec!["disagree.safetensors", "rnn.weight_ih_l1"]),
    ];
    for (m, needles) in &models {
        for args in [
            vec!["quantize", m.as_str(), "--calib", d, "-o", &o],
            vec!["run", m, "--data", d, "-o", &o],
            vec!["report", b, "--float", m, "--data", d, "--json", &o],
            vec!["sweep", m, "--calib", d, "--data", d, "--json", &o],
        ] {
            refuses(&args, &out, needles);
        }
    }
    // Huge dimensions (memory exhaustion attempts) are refused from the
    // header, before anything that size is allocated: a safetensors header
    // claiming a 2^40-element tensor, an npz member claiming 2^20 x 2^20.
    let header = br#"{"rnn.weight_ih_l0":{"dtype":"F32","shape":[1099511627776],"data_offsets":[0,4]}}"#;
    let mut st = (header.len() as u64).to_le_bytes().to_vec();
    st.extend_from_slice(header);
    st.extend_from_slice(&[0; 4]);
    let st = fx.file("huge.safetensors", st);
    refuses(&["quantize", &st, "--calib", d, "-o", &o], &out, &["huge.safetensors", "1099511627776", "2^26"]);
    let member = npy("<f4", "(1048576, 1048576)", &[0; 16]);
    let npz = fx.file("huge.npz", zip_one("lstm.weight_ih_l0.npy", &member));
    refuses(&["run", &npz, "--data", d, "-o", &o], &out, &["huge.npz", "1048576", "2^26"]);
    // An npz member whose header nests 21 brackets (npyz's parser would take
    // minutes; refused from the depth).
    let deep =
        format!("{{'descr': '<f4', 'fortran_order': False, 'shape': {}1, 1{}, }}", "(".repeat(20), ")".repeat(20));
    let mut member = b"\x93NUMPY\x01\x00".to_vec();
    member.extend_from_slice(&(deep.len() as u16).to_le_bytes());
    member.extend_from_slice(deep.as_bytes());
    member.extend_from_slice(&[0; 4]);
    let npz = fx.file("deep.npz", zip_one("lstm.weight_ih_l0.npy", &member));
    refuses(&["quantize", &npz, "--calib", d, "-o", &o], &out, &["deep.npz", "nests brackets 21 deep"]);
    // A header length of 2^60 bytes.
    let mut st = (1u64 << 60).to_le_bytes().to_vec();
    st.extend_from_slice(b"{}");
    let st = fx.file("hugeheader.safetensors", st);
    refuses(&["quantize", &st, "--calib", d, "-o", &o], &out, &["hugeheader.safetensors", "header length"]);
    // A safetensors file that is not JSON inside, and one with no tensors.
    let mut st = 4u64.to_le_bytes().to_vec();
    st.extend_from_slice(b"{{{{");
    let st = fx.file("garbage.safetensors", st);
    refuses(&["quantize", &st, "--calib", d, "-o", &o], &out, &["garbage.safetensors", "corrupt header"]);
    // An unknown file type.
    let txt = fx.file("model.txt", "not a model");
    refuses(&["quantize", &txt, "--calib", d, "-o", &o], &out, &["model.txt"]);
}

#[test]
fn bad_data_files() {
    let fx = Fx::new();
    let out = fx.path("out.file");
    let o = s(&out);
    let (m, b) = (fx.model.as_str(), fx.blob.as_str());
    let header = "s0,s1,s2,s3\n";
    let cases: Vec<(&str, Vec<u8>, Vec<&str>)> = vec![
        ("word.csv", format!("{header}1,2,3,4\n1,two,3,4\n").into_bytes(), vec!["word.csv", "line 3", "s1", "two"]),
        (
            "blank.csv",
            format!("{header}1,2,3,4\n1,,3,4\n").into_bytes(),
            vec!["blank.csv", "line 3", "s1", "empty cell"],
        ),
        ("nan.csv", format!("{header}1,2,3,4\n1,2,NaN,4\n").into_bytes(), vec!["nan.csv", "line 3", "s2"]),
        ("inf.csv", format!("{header}1,2,3,inf\n").into_bytes(), vec!["inf.csv", "line 2", "s3"]),
        ("short.csv", format!("{header}1,2,3,4\n1,2,3\n").into_bytes(), vec!["short.csv", "line 3", "3 fields"]),
        ("long.csv", format!("{header}1,2,3,4,5\n").into_bytes(), vec!["long.csv", "line 2", "5 fields"]),
        ("header.csv", header.to_string().into_bytes(), vec!["header.csv", "no data rows"]),
        (
            "five.csv",
            "a,b,c,d,e\n1,2,3,4,5\n".to_string().into_bytes(),
            vec!["five.csv", "5 feature columns", "4 inputs"],
        ),
        ("label.csv", "s0,s1,s2,s3,label\n1,2,3,4,7\n".to_string().into_bytes(), vec!["label.csv", "label"]),
        ("bytes.csv", [header.as_bytes(), b"1,2,3,\xff\n"].concat(), vec!["bytes.csv", "line 2"]),
    ];
    for (name, text, needles) in &cases {
        let p = fx.file(name, text);
        for args in [
            vec!["quantize", m, "--calib", &p, "-o", &o],
            vec!["run", b, "--data", &p, "-o", &o],
            vec!["run", m, "--data", &p, "-o", &o],
            vec!["report", b, "--float", m, "--data", &p, "--json", &o],
            vec!["sweep", m, "--calib", &fx.data, "--data", &p, "--json", &o],
        ] {
            refuses(&args, &out, needles);
        }
    }
    // fit: the training data (any width) with bad cells.
    let p = fx.file("fit.csv", "a,b\n1,2\n3,\n");
    refuses(&["fit", "--train", &p, "-o", &o], &out, &["fit.csv", "line 3", "empty cell"]);
    // detect: the data has a different feature count than the model.
    let p = fx.file("det3.csv", "a,b,c\n1,2,3\n");
    refuses(&["detect", &fx.det_blob, "--data", &p, "--json", &o], &out, &["det3.csv", "4 inputs"]);
    let p = fx.file("detbad.csv", "a,b,c,d,label\n1,2,3,4,0\n1,2,x,4,0\n");
    refuses(&["detect", &fx.det_blob, "--data", &p, "--json", &o], &out, &["detbad.csv", "line 3", "x"]);
    // .npy: integer dtype, 3-D, shape of 2^40 rows (refused as truncated
    // before reading), a header length beyond the file.
    for (name, bytes, why) in [
        ("int.npy", npy("<i4", "(2, 4)", &[0; 32]), "dtype"),
        ("cube.npy", npy("<f4", "(1, 2, 4)", &[0; 32]), "[T, X]"),
        ("rows.npy", npy("<f4", "(1099511627776, 4)", &[0; 16]), "truncated"),
        ("wide.npy", npy("<f4", "(1, 3)", &[0; 12]), "4 inputs"),
        ("hdr.npy", b"\x93NUMPY\x02\x00\xff\xff\xff\x7f{".to_vec(), "header claims"),
        ("deep.npy", npy("<f4", &format!("{}4,{}", "(".repeat(20), ")".repeat(20)), &[0; 16]), "nests brackets"),
    ] {
        let p = fx.file(name, bytes);
        refuses(&["run", b, "--data", &p, "-o", &o], &out, &[name, why]);
        refuses(&["quantize", m, "--calib", &p, "-o", &o], &out, &[name, why]);
    }
    // Raw device inputs outside int16.
    let p = fx.file("raw.csv", format!("{header}1,2,3,40000\n"));
    refuses(&["run", b, "--data", &p, "--raw-input", "-o", &o], &out, &["raw.csv"]);
}

#[test]
fn bad_budget_and_scenario_files() {
    let fx = Fx::new();
    let out = fx.path("out.json");
    let o = s(&out);
    let (m, d, b) = (fx.model.as_str(), fx.data.as_str(), fx.blob.as_str());
    let cases: [(&str, &str, &[&str]); 6] = [
        ("unknown.toml", "output_sqnr_min_db = 40\nsqnr_min = 3\n", &["unknown.toml", "unknown key `sqnr_min`"]),
        ("type.toml", "output_sqnr_min_db = \"forty\"\n", &["type.toml", "output_sqnr_min_db", "string"]),
        ("neg.toml", "ram_max_bytes = -5\n", &["neg.toml", "ram_max_bytes"]),
        ("syntax.toml", "output_sqnr_min_db = = 40\n", &["syntax.toml", "1:"]),
        ("none.toml", "", &["none.toml", "no limit"]),
        ("binary.toml", "\u{0}\u{1}\u{2}", &["binary.toml"]),
    ];
    for (name, text, needles) in cases {
        let p = fx.file(name, text);
        refuses(&["report", b, "--float", m, "--data", d, "--budget", &p, "--json", &o], &out, needles);
        refuses(&["sweep", m, "--calib", d, "--data", d, "--budget", &p, "--json", &o], &out, needles);
    }
    let big = fx.path("big.toml");
    std::fs::File::create(&big).unwrap().set_len(8 << 20).unwrap();
    refuses(&["sweep", m, "--calib", d, "--data", d, "--budget", &s(&big)], &out, &["big.toml", "8388608 bytes"]);
    let p = fx.file("not-utf8.toml", [0xff, 0xfe, 0x41]);
    refuses(&["report", b, "--float", m, "--data", d, "--budget", &p, "--json", &o], &out, &["not-utf8.toml"]);
    // A scenario with an unknown key and one with a wrong type.
    let scen = std::fs::read_to_string(root().join("demo-data/scenario.toml")).unwrap();
    let unknown = fx.file("unknown-scen.toml", format!("colour = \"red\"\n{scen}"));
    let csv = fx.path("out.csv");
    refuses(&["simulate", &unknown, "-o", &s(&csv)], &csv, &["unknown-scen.toml", "colour"]);
    let typed = fx.file("typed-scen.toml", scen.replacen("seed = ", "seed = \"x\" #", 1));
    refuses(&["simulate", &typed, "-o", &s(&csv)], &csv, &["typed-scen.toml", "seed"]);
    // demo reads the scenario from its demo-data directory.
    let demo_data = fx.path("demo-data");
    std::fs::create_dir(&demo_data).unwrap();
    std::fs::write(demo_data.join("scenario.toml"), "name = 3\n").unwrap();
    let demo_out = fx.path("demo-out");
    refuses(&["demo", "--demo-data", &s(&demo_data), "--out", &s(&demo_out)], &demo_out, &["scenario.toml"]);
    // A valid scenario without the shipped model: refused before any data
    // set is generated (the output directory is never created).
    let no_model = fx.path("demo-data-no-model");
    std::fs::create_dir(&no_model).unwrap();
    std::fs::copy(root().join("demo-data/scenario.toml"), no_model.join("scenario.toml")).unwrap();
    refuses(&["demo", "--demo-data", &s(&no_model), "--out", &s(&demo_out)], &demo_out, &["model.safetensors"]);
}

#[test]
fn outputs_in_missing_directories_and_existing_outputs_kept() {
    let fx = Fx::new();
    let (m, d, b) = (fx.model.as_str(), fx.data.as_str(), fx.blob.as_str());
    let scen = root().join("demo-data/scenario.toml").display().to_string();
    let missing = |name: &str| s(&fx.path("no-such-dir").join(name));
    let (lwq, csv, rs, st, json, plots) = (
        missing("o.lwq"),
        missing("o.csv"),
        missing("o.rs"),
        missing("o.safetensors"),
        missing("o.json"),
        missing("plots"),
    );
    let ok_csv = s(&fx.path("ok.csv"));
    let cases: Vec<(Vec<&str>, &str)> = vec![
        (vec!["quantize", m, "--calib", d, "-o", &lwq], &lwq),
        (vec!["run", b, "--data", d, "-o", &csv], &csv),
        (vec!["codegen", b, "-o", &rs], &rs),
        (vec!["fit", "--train", d, "-o", &st, "--epochs", "1"], &st),
        (vec!["simulate", &scen, "--set", "sample", "-o", &csv], &csv),
        (vec!["simulate", &scen, "--set", "sample", "-o", &ok_csv, "--events", &json], &json),
        (vec!["report", b, "--float", m, "--data", d, "--json", &json], &json),
        (vec!["report", b, "--float", m, "--data", d, "--plot", &plots], &plots),
        (vec!["sweep", m, "--calib", d, "--data", d, "--json", &json], &json),
        (vec!["detect", &fx.det_blob, "--data", &fx.det_data, "--json", &json], &json),
    ];
    for (args, out) in &cases {
        let extra = fx.path("ok.csv");
        refuses_all(args, &[Path::new(out), &extra], &["no-such-dir", "does not exist"]);
    }
    assert!(!fx.path("no-such-dir").exists());

    // A failing command leaves an existing output exactly as it was.
    let bad = fx.file("bad.csv", "s0,s1,s2,s3\n1,2,x,4\n");
    let keep = |name: &str| {
        let p = fx.path(name);
        std::fs::write(&p, "keep me\n").unwrap();
        p
    };
    let (k_lwq, k_csv, k_rs, k_st, k_json) =
        (keep("k.lwq"), keep("k.csv"), keep("k.rs"), keep("k.safetensors"), keep("k.json"));
    let empty = fx.file("empty.lwq", "");
    let bad_scen = fx.file("bad-scen.toml", "name = 1\n");
    refuses(&["quantize", m, "--calib", &bad, "-o", &s(&k_lwq)], &k_lwq, &["bad.csv"]);
    refuses(&["run", b, "--data", &bad, "-o", &s(&k_csv)], &k_csv, &["bad.csv"]);
    refuses(&["codegen", &empty, "-o", &s(&k_rs)], &k_rs, &["empty.lwq"]);
    refuses(&["fit", "--train", &bad, "-o", &s(&k_st)], &k_st, &["bad.csv"]);
    refuses(&["simulate", &bad_scen, "-o", &s(&k_csv)], &k_csv, &["bad-scen.toml"]);
    refuses(&["report", b, "--float", m, "--data", &bad, "--json", &s(&k_json)], &k_json, &["bad.csv"]);
    refuses(&["sweep", m, "--calib", d, "--data", &bad, "--json", &s(&k_json)], &k_json, &["bad.csv"]);
    refuses(&["detect", &fx.det_blob, "--data", &bad, "--json", &s(&k_json)], &k_json, &["bad.csv"]);
}

/// Runs `lapwing` with standard output and error going to pipes whose read
/// ends are closed at once (`lapwing ... 2>&1 | head -0`); returns the exit
/// status code.
fn with_closed_pipes(args: &[&str]) -> Option<i32> {
    use std::process::{Command, Stdio};
    let mut child = Command::new(env!("CARGO_BIN_EXE_lapwing"))
        .args(args)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    drop(child.stdout.take());
    drop(child.stderr.take());
    child.wait().unwrap().code()
}

#[test]
fn closed_pipes_do_not_panic() {
    let fx = Fx::new();
    let o = s(&fx.path("out.csv"));
    // An error message to a closed stderr: still exit status 2 (a panic is 101).
    assert_eq!(with_closed_pipes(&["inspect", "absent.lwq"]), Some(2));
    // Success with progress on stderr and a table on stdout, both closed.
    assert_eq!(with_closed_pipes(&["run", &fx.blob, "--data", &fx.data, "-o", &o]), Some(0));
    assert_eq!(with_closed_pipes(&["inspect", &fx.blob]), Some(0));
}
