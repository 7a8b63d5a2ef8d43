//! Host side of the firmware-in-the-loop check (`tools/firmware/check.sh`):
//! writes the synthetic models and signals, the firmware's compiled-in
//! `int16` input sequence, compares the rows the firmware printed with the
//! host's, turns the firmware's timer readings into emulated instructions,
//! and gathers everything into `measurements.json` and a Markdown table.
//! When the panic-free link proof fails, it lists where the panic paths
//! come from.
//!
//! The models and signals are invented (seeded): never a claim about real
//! machines. Run by the script; by hand:
//! `cargo run --release -p lapwing-tools --example firmware_loop -- --help`.

use anyhow::{bail, Context, Result};
use clap::{Parser, Subcommand};
use lapwing_tools::float_model::FloatModelData;
use lapwing_tools::quantize::input_to_int;
use lapwing_tools::synth::{self, ModelSpec};
use lapwing_tools::{blob::LoadedBlob, data, example};
use serde_json::{json, Map, Value};
use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::process::Command;

#[derive(Parser)]
#[command(about = "Host side of tools/firmware/check.sh")]
struct Cli {
    #[command(subcommand)]
    cmd: Cmd,
}

#[derive(Subcommand)]
enum Cmd {
    /// Write a synthetic float model (Lapwing's safetensors layout), its
    /// calibration data and a signal into DIR.
    Shape {
        /// `demo` (X=4, H=32, 1 layer, head Y=4: the model of `lapwing demo`)
        /// or `deep` (X=3, H=5, 3 layers, no head).
        name: String,
        dir: PathBuf,
    },
    /// Quantize the first STEPS rows of DATA with the blob's input scales
    /// into DIR/inputs.csv (for `lapwing run --raw-input`) and DIR/inputs.rs
    /// (compiled into the firmware).
    Inputs {
        blob: PathBuf,
        data: PathBuf,
        #[arg(long)]
        steps: usize,
        #[arg(long)]
        config: String,
        #[arg(long)]
        dir: PathBuf,
    },
    /// Check one firmware log against the host's outputs and write its
    /// measurements as JSON (exit 1 when the rows differ or the run failed).
    Record {
        #[arg(long)]
        log: PathBuf,
        /// `lapwing run --raw-input` output for the same blob and inputs.
        #[arg(long)]
        host: PathBuf,
        /// `text data bss` of the measurement firmware.
        #[arg(long)]
        size: String,
        /// `text data bss` of the minimal firmware (the proof build), if it linked.
        #[arg(long)]
        min_size: Option<String>,
        /// Extra `key=value` fields (config, model, scheme, cell, ...).
        #[arg(long = "meta")]
        meta: Vec<String>,
        #[arg(long)]
        out: PathBuf,
    },
    /// Write one panic-free proof result as JSON.
    Proof {
        #[arg(long)]
        target: String,
        #[arg(long)]
        profile: String,
        /// Whether the proof build linked (`true` or `false`).
        #[arg(long, action = clap::ArgAction::Set)]
        linked: bool,
        /// The canary build (a deliberate panic path) failed to link, as it must.
        #[arg(long)]
        canary_refused: Option<bool>,
        /// The proof firmware ran and exited 0.
        #[arg(long)]
        ran: Option<bool>,
        /// File with the panic sites found (when it did not link).
        #[arg(long)]
        sites: Option<PathBuf>,
        /// `text data bss` of the proof firmware (or, when it did not link,
        /// of the same program with a defined panic handler).
        #[arg(long)]
        size: Option<String>,
        #[arg(long)]
        out: PathBuf,
    },
    /// List where panic paths come from, in a proof build linked with a
    /// defined panic handler (feature `diagnose`).
    PanicSites {
        elf: PathBuf,
        /// The core's source directory (frames inside it are the origins).
        #[arg(long)]
        src: PathBuf,
        #[arg(long, default_value = "arm-none-eabi-objdump")]
        objdump: String,
        #[arg(long, default_value = "arm-none-eabi-addr2line")]
        addr2line: String,
    },
    /// Gather the per-run and proof JSON files into one JSON file and a
    /// Markdown table (also printed).
    Summary {
        #[arg(long)]
        json: PathBuf,
        #[arg(long)]
        markdown: PathBuf,
        #[arg(long)]
        steps: usize,
        files: Vec<PathBuf>,
    },
}

fn main() -> Result<()> {
    match Cli::parse().cmd {
        Cmd::Shape { name, dir } => shape(&name, &dir),
        Cmd::Inputs { blob, data, steps, config, dir } => inputs(&blob, &data, steps, &config, &dir),
        Cmd::Record { log, host, size, min_size, meta, out } => {
            record(&log, &host, &size, min_size.as_deref(), &meta, &out)
        }
        Cmd::Proof { target, profile, linked, canary_refused, ran, sites, size, out } => {
            let (flash, ram) = match size {
                Some(s) => sizes(&s).map(|(f, r)| (Some(f), Some(r)))?,
                None => (None, None),
            };
            let sites = match sites {
                Some(p) => std::fs::read_to_string(&p)
                    .with_context(|| format!("{}: cannot read", p.display()))?
                    .lines()
                    .map(str::to_string)
                    .collect(),
                None => Vec::new(),
            };
            let v = json!({
                "kind": "proof", "target": target, "profile": profile, "linked": linked,
                "canary_refused": canary_refused, "ran": ran, "panic_sites": sites,
                "flash_bytes": flash, "ram_bytes": ram,
            });
            write_json(&out, &v)
        }
        Cmd::PanicSites { elf, src, objdump, addr2line } => {
            for s in panic_sites(&elf, &src, &objdump, &addr2line)? {
                println!("{s}");
            }
            Ok(())
        }
        Cmd::Summary { json, markdown, steps, files } => summary(&json, &markdown, steps, &files),
    }
}

fn write_json(path: &Path, v: &Value) -> Result<()> {
    let text = serde_json::to_string_pretty(v)? + "\n";
    std::fs::write(path, text).with_context(|| format!("{}: cannot write", path.display()))
}

// ---------------------------------------------------------------- models

/// Lapwing's own tensor layout (DESIGN.md section 4), little-endian f32.
fn write_safetensors(model: &FloatModelData, path: &Path) -> Result<()> {
    let mut tensors: Vec<(String, Vec<usize>, Vec<u8>)> = Vec::new();
    let bytes = |v: &[f32]| v.iter().flat_map(|x| x.to_le_bytes()).collect::<Vec<u8>>();
    for (k, l) in model.layers.iter().enumerate() {
        tensors.push((format!("layers.{k}.w_x"), vec![4 * l.hidden, l.input], bytes(&l.w_x)));
        tensors.push((format!("layers.{k}.w_h"), vec![4 * l.hidden, l.hidden], bytes(&l.w_h)));
        tensors.push((format!("layers.{k}.b"), vec![4 * l.hidden], bytes(&l.b)));
    }
    if let Some(h) = &model.head {
        tensors.push(("head.w".into(), vec![h.output, h.input], bytes(&h.w)));
        tensors.push(("head.b".into(), vec![h.output], bytes(&h.b)));
    }
    let views = tensors
        .iter()
        .map(|(name, shape, data)| {
            safetensors::tensor::TensorView::new(safetensors::Dtype::F32, shape.clone(), data)
                .map(|v| (name.clone(), v))
                .map_err(|e| anyhow::anyhow!("{name}: {e}"))
        })
        .collect::<Result<Vec<_>>>()?;
    safetensors::serialize_to_file(views, &None, path).map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))
}

fn shape(name: &str, dir: &Path) -> Result<()> {
    let (spec, seed, calib, signal) = match name {
        // The model and signals of `lapwing demo` (tools/src/example.rs).
        "demo" => (
            example::SPEC,
            2026,
            synth::random_walk(example::SPEC.input, example::CALIB_STEPS, 1),
            synth::random_walk(example::SPEC.input, 4_000, 2),
        ),
        // Three stacked layers, an odd hidden size (w8a8 packs two hidden
        // values per state word) and no head (the output is the last h).
        "deep" => {
            let spec = ModelSpec { input: 3, hidden: 5, layers: 3, output: None, gain: 1.0 };
            (spec, 7, synth::sine_mix(3, 20_000, 8), synth::sine_mix(3, 4_000, 9))
        }
        other => bail!("unknown shape `{other}` (expected demo or deep)"),
    };
    std::fs::create_dir_all(dir).with_context(|| format!("{}: cannot create", dir.display()))?;
    write_safetensors(&synth::random_model(&spec, seed), &dir.join("model.safetensors"))?;
    let header: Vec<String> = (0..spec.input).map(|i| format!("s{i}")).collect();
    data::write_csv(&dir.join("calib.csv"), &header, &calib)?;
    data::write_csv(&dir.join("signal.csv"), &header, &signal)?;
    Ok(())
}

fn inputs(blob: &Path, data_path: &Path, steps: usize, config: &str, dir: &Path) -> Result<()> {
    if steps == 0 {
        bail!("--steps must be at least 1");
    }
    if !config.chars().all(|c| c.is_ascii_alphanumeric() || c == '-' || c == '_') {
        bail!("configuration name `{config}` must be letters, digits, - and _");
    }
    let loaded = LoadedBlob::read(blob)?;
    let parsed = loaded.parse()?;
    let scale = parsed.input_scale();
    let mut rows: Vec<Vec<i16>> = Vec::with_capacity(steps);
    data::for_each_row(data_path, false, |_, x, _| {
        if x.len() != scale.len() {
            bail!("has {} feature columns but the model takes {}", x.len(), scale.len());
        }
        if rows.len() < steps {
            rows.push(input_to_int(x, scale));
        }
        Ok(())
    })?;
    if rows.len() < steps {
        bail!("{}: has {} rows, {steps} are needed", data_path.display(), rows.len());
    }
    let x = scale.len();
    let header: Vec<String> = (0..x).map(|i| format!("x{i}")).collect();
    let as_f32: Vec<Vec<f32>> = rows.iter().map(|r| r.iter().map(|v| *v as f32).collect()).collect();
    data::write_csv(&dir.join("inputs.csv"), &header, &as_f32)?;

    let mut s = String::new();
    let _ = writeln!(s, "// Generated by tools/examples/firmware_loop.rs (tools/firmware/check.sh). Do not edit.");
    let _ = writeln!(
        s,
        "// The first {steps} rows of {}, quantized with the blob's input scales: raw int16 device inputs,",
        data_path.display()
    );
    let _ = writeln!(s, "// the same values `lapwing run --raw-input` reads from inputs.csv beside this file.\n");
    let _ = writeln!(s, "/// Configuration name (model, scheme, cell).\npub const CONFIG: &str = \"{config}\";");
    let _ = writeln!(s, "/// Steps in the sequence.\npub const STEPS: usize = {steps};");
    let _ = writeln!(s, "/// Input features per step.\npub const FEATURES: usize = {x};");
    let _ = writeln!(s, "\n/// One row of raw int16 inputs per step.\npub static INPUT: [[i16; FEATURES]; STEPS] = [");
    for r in &rows {
        let cells: Vec<String> = r.iter().map(|v| v.to_string()).collect();
        let _ = writeln!(s, "    [{}],", cells.join(", "));
    }
    s.push_str("];\n");
    let path = dir.join("inputs.rs");
    std::fs::write(&path, s).with_context(|| format!("{}: cannot write", path.display()))
}

// ---------------------------------------------------------------- logs

/// What the firmware printed (protocol in examples/firmware/src/bin/run.rs).
#[derive(Default)]
struct Log {
    fields: HashMap<String, HashMap<String, String>>,
    rows: Vec<(usize, Vec<i64>)>,
    errors: Vec<String>,
    done: bool,
}

impl Log {
    fn read(path: &Path) -> Result<Log> {
        let text = std::fs::read_to_string(path).with_context(|| format!("{}: cannot read", path.display()))?;
        let mut log = Log::default();
        for (n, line) in text.lines().enumerate() {
            let mut words = line.split_whitespace();
            let Some(tag) = words.next() else { continue };
            match tag {
                "R" => {
                    let nums: Result<Vec<i64>, _> = words.map(str::parse::<i64>).collect();
                    match nums.ok().and_then(|v| v.split_first().map(|(t, y)| (*t, y.to_vec()))) {
                        Some((t, y)) if t >= 0 => log.rows.push((t as usize, y)),
                        _ => bail!("{}: line {}: malformed output row `{line}`", path.display(), n + 1),
                    }
                }
                "error" => log.errors.push(line.to_string()),
                "done" => log.done = true,
                _ => {
                    let kv = words.filter_map(|w| w.split_once('=')).map(|(k, v)| (k.to_string(), v.to_string()));
                    log.fields.entry(tag.to_string()).or_default().extend(kv);
                }
            }
        }
        Ok(log)
    }

    fn get(&self, tag: &str, key: &str) -> Result<&str> {
        self.fields
            .get(tag)
            .and_then(|m| m.get(key))
            .map(String::as_str)
            .with_context(|| format!("the firmware log has no `{tag} {key}=`"))
    }

    fn num(&self, tag: &str, key: &str) -> Result<f64> {
        let v = self.get(tag, key)?;
        v.parse::<f64>().with_context(|| format!("`{tag} {key}={v}` is not a number"))
    }
}

/// `text data bss` (arm-none-eabi-size's Berkeley columns): flash is text +
/// data (the initial values of .data live in flash), RAM is data + bss.
fn sizes(s: &str) -> Result<(u64, u64)> {
    let v: Vec<u64> = s.split_whitespace().map(str::parse).collect::<Result<_, _>>().context("size: not numbers")?;
    let [text, data, bss] = v[..] else { bail!("size: expected `text data bss`, got `{s}`") };
    Ok((text + data, data + bss))
}

fn record(log_path: &Path, host: &Path, size: &str, min_size: Option<&str>, meta: &[String], out: &Path) -> Result<()> {
    let log = Log::read(log_path)?;
    let mut v = Map::new();
    v.insert("kind".into(), json!("run"));
    for m in meta {
        let Some((k, val)) = m.split_once('=') else { bail!("--meta `{m}` is not key=value") };
        v.insert(k.to_string(), json!(val));
    }
    // Bit-exact comparison, row by row.
    let host_rows = data::read(host, false)?.rows;
    let mut mismatch: Option<String> = None;
    if log.rows.len() != host_rows.len() {
        mismatch = Some(format!("the firmware printed {} rows, the host wrote {}", log.rows.len(), host_rows.len()));
    }
    for (i, ((t, y), h)) in log.rows.iter().zip(&host_rows).enumerate() {
        if mismatch.is_some() {
            break;
        }
        let h: Vec<i64> = h.iter().map(|x| *x as i64).collect();
        if *t != i {
            mismatch = Some(format!("row {i} is numbered {t}"));
        } else if *y != h {
            mismatch = Some(format!("step {t}: firmware {y:?}, host {h:?}"));
        }
    }
    let bit_exact = mismatch.is_none() && log.done && log.errors.is_empty() && !log.rows.is_empty();
    v.insert("bit_exact".into(), json!(bit_exact));
    v.insert("rows_compared".into(), json!(log.rows.len().min(host_rows.len())));
    if let Some(m) = &mismatch {
        v.insert("mismatch".into(), json!(m));
    }
    if !log.errors.is_empty() {
        v.insert("errors".into(), json!(log.errors));
    }
    let measured = (|| -> Result<()> {
        for key in ["target", "board", "cpu", "config"] {
            v.insert(key.into(), json!(log.get("info", key)?));
        }
        for key in ["inputs", "outputs", "state_words", "blob_bytes", "steps"] {
            v.insert(key.into(), json!(log.num("info", key)? as u64));
        }
        let macs = log.num("info", "macs")?;
        v.insert("macs_per_step".into(), json!(macs as u64));
        // Emulated instructions per SysTick tick, from the calibration loop.
        let ipt = log.num("calib", "instructions")? / log.num("calib", "ticks")?;
        let overhead = log.num("timer", "ticks")? / log.num("timer", "windows")?;
        let steps = log.num("time", "steps")?;
        let ticks = log.num("time", "ticks")? - log.num("time", "windows")? * overhead;
        let per_step = ticks * ipt / steps;
        v.insert("instructions_per_tick".into(), json!(round(ipt, 3)));
        v.insert("instructions_per_step".into(), json!(round(per_step, 1)));
        v.insert("instructions_per_mac".into(), json!(round(per_step / macs, 3)));
        v.insert("parse_instructions".into(), json!(((log.num("parse", "ticks")? - overhead) * ipt).round()));
        v.insert("stack_step_bytes".into(), json!(log.num("stack", "step_bytes")? as u64));
        v.insert("stack_parse_bytes".into(), json!(log.num("stack", "parse_bytes")? as u64));
        Ok(())
    })();
    let (flash, ram) = sizes(size)?;
    v.insert("flash_bytes".into(), json!(flash));
    v.insert("ram_bytes".into(), json!(ram));
    if let Some(s) = min_size {
        let (flash, ram) = sizes(s)?;
        v.insert("min_flash_bytes".into(), json!(flash));
        v.insert("min_ram_bytes".into(), json!(ram));
    }
    write_json(out, &Value::Object(v.clone()))?;
    let show = |k: &str| v.get(k).map_or("?".to_string(), |x| x.to_string().trim_matches('"').to_string());
    match (&measured, bit_exact) {
        (Ok(()), true) => {
            println!(
                "    bit-exact over {} steps; {} instructions/step ({} per MAC), stack {} B, flash {} B, RAM {} B",
                show("rows_compared"),
                show("instructions_per_step"),
                show("instructions_per_mac"),
                show("stack_step_bytes"),
                show("flash_bytes"),
                show("ram_bytes")
            );
            Ok(())
        }
        _ => {
            if let Some(m) = &mismatch {
                println!("    NOT bit-exact: {m}");
            }
            for e in &log.errors {
                println!("    firmware: {e}");
            }
            if !log.done {
                println!("    the firmware did not finish (no `done` line): see {}", log_path.display());
            }
            if let Err(e) = measured {
                println!("    measurements missing: {e:#}");
            }
            std::process::exit(1)
        }
    }
}

fn round(x: f64, digits: i32) -> f64 {
    let p = 10f64.powi(digits);
    (x * p).round() / p
}

// ---------------------------------------------------------------- panic sites

/// Functions that only panic (or are the panic handler).
fn is_panic_fn(name: &str) -> bool {
    name.starts_with("core::panicking::")
        || name.contains("rust_begin_unwind")
        || name.starts_with("core::slice::index::")
        || name.starts_with("core::option::unwrap_failed")
        || name.starts_with("core::option::expect_failed")
        || name.starts_with("core::result::unwrap_failed")
        || name.starts_with("core::str::slice_error_fail")
        || name.starts_with("core::cell::panic_already")
}

/// Code that is not the core's or this crate's: `core` (inherent methods
/// of slices and primitives included), the core's dependencies, compiler
/// builtins, and fragments the machine outliner split off (opt-level z),
/// whose panics are reported at their callers.
fn is_library(name: &str) -> bool {
    const CRATES: [&str; 7] =
        ["core::", "crc::", "heapless::", "bytemuck::", "libm::", "compiler_builtins", "OUTLINED_FUNCTION"];
    const PRIMITIVES: [&str; 17] = [
        "i8", "i16", "i32", "i64", "i128", "isize", "u8", "u16", "u32", "u64", "u128", "usize", "f32", "f64", "bool",
        "char", "str",
    ];
    let n = name.trim_start_matches('<');
    if CRATES.iter().any(|c| n.starts_with(c)) {
        return true;
    }
    // `<[i16]>::split_at_mut`, `<i32>::pow`, `<&str as core::fmt::Display>::fmt`
    // are core's; `<i8 as lapwing::quant::Weight>::dot` is the core's own.
    let head = n.split(['>', ' ']).next().unwrap_or("");
    let rest = n.get(head.len()..).unwrap_or("");
    let primitive = head.starts_with(['[', '&', '(']) || PRIMITIVES.contains(&head);
    primitive && (rest.starts_with('>') || rest.starts_with(" as core::"))
}

struct Insn {
    addr: u64,
    mnemonic: String,
    target: Option<(u64, String)>,
    operands: String,
}

fn is_branch(m: &str) -> bool {
    let m = m.trim_end_matches(".n").trim_end_matches(".w");
    m == "b"
        || m == "bl"
        || m == "cbz"
        || m == "cbnz"
        || (m.len() == 3 && m.starts_with('b') && m != "bic" && m != "bfi" && m != "bkpt" && m != "blx")
}

fn is_unconditional_end(i: &Insn) -> bool {
    let m = i.mnemonic.trim_end_matches(".n").trim_end_matches(".w");
    m == "b" || m == "bx" || m == "udf" || ((m == "pop" || m.starts_with("ldm")) && i.operands.contains("pc"))
}

/// Call sites that reach a panic, mapped back to the core's source through
/// the debug info (inlined frames included), deduplicated.
fn panic_sites(elf: &Path, src: &Path, objdump: &str, addr2line: &str) -> Result<Vec<String>> {
    let out = Command::new(objdump)
        .args(["-d", "--demangle", "--no-show-raw-insn"])
        .arg(elf)
        .output()
        .with_context(|| format!("cannot run {objdump}"))?;
    if !out.status.success() {
        bail!("{objdump} failed: {}", String::from_utf8_lossy(&out.stderr));
    }
    let text = String::from_utf8_lossy(&out.stdout);
    let mut funcs: Vec<(String, Vec<Insn>)> = Vec::new();
    for line in text.lines() {
        if let Some(rest) = line.strip_suffix(">:") {
            if let Some((_, name)) = rest.split_once(" <") {
                funcs.push((name.to_string(), Vec::new()));
            }
            continue;
        }
        let Some((addr, rest)) = line.trim_start().split_once(":\t") else { continue };
        let Ok(addr) = u64::from_str_radix(addr.trim(), 16) else { continue };
        let mut parts = rest.splitn(2, '\t');
        let mnemonic = parts.next().unwrap_or("").trim().to_string();
        let operands = parts.next().unwrap_or("").trim().to_string();
        let target = if is_branch(&mnemonic) {
            // `cbz r0, 2378 <sym>`: the address is the last operand before the symbol.
            let plain = operands.split('<').next().unwrap_or("");
            let hex = plain.rsplit(',').next().unwrap_or("").trim();
            let sym = operands.split_once('<').map(|(_, s)| s.trim_end_matches('>').to_string()).unwrap_or_default();
            u64::from_str_radix(hex, 16).ok().map(|a| (a, sym))
        } else {
            None
        };
        if let Some((_, insns)) = funcs.last_mut() {
            insns.push(Insn { addr, mnemonic, target, operands });
        }
    }
    // Functions that can panic: the panic functions themselves, then,
    // to a fixed point, library functions (core, dependencies) that call
    // one. Sites are reported in the core's (and this crate's) own code,
    // at the call of a panicking library function or at a branch into a
    // block that ends in one.
    let base = |sym: &str| sym.split('+').next().unwrap_or("").to_string();
    let mut panicky: BTreeSet<String> = BTreeSet::new();
    let mut sites: BTreeMap<u64, String> = BTreeMap::new();
    loop {
        let before = panicky.len();
        sites.clear();
        for (name, insns) in &funcs {
            if is_panic_fn(name) {
                continue;
            }
            let callee = |i: &Insn| {
                i.target.as_ref().map(|(_, sym)| base(sym)).filter(|f| is_panic_fn(f) || panicky.contains(f))
            };
            // Blocks ending in such a call: from the instruction after the
            // previous unconditional end to the call.
            let mut block: BTreeMap<u64, String> = BTreeMap::new();
            let mut found: BTreeMap<u64, String> = BTreeMap::new();
            for (k, i) in insns.iter().enumerate() {
                let Some(f) = callee(i) else { continue };
                found.insert(i.addr, f.clone());
                let mut s = k;
                while s > 0 && !is_unconditional_end(&insns[s - 1]) && callee(&insns[s - 1]).is_none() {
                    s -= 1;
                    block.insert(insns[s].addr, f.clone());
                }
                block.insert(i.addr, f);
            }
            for i in insns {
                if let Some((t, _)) = &i.target {
                    if let Some(f) = block.get(t) {
                        found.insert(i.addr, f.clone());
                    }
                }
            }
            if found.is_empty() {
                continue;
            }
            if is_library(name) {
                panicky.insert(name.clone());
            } else {
                sites.extend(found);
            }
        }
        if panicky.len() == before {
            break;
        }
    }
    if sites.is_empty() {
        return Ok(vec!["no call of a panic function found in the core's code".into()]);
    }
    let out = Command::new(addr2line)
        .args(["-a", "-i", "-f", "-C", "-e"])
        .arg(elf)
        .args(sites.keys().map(|a| format!("{a:#x}")))
        .output()
        .with_context(|| format!("cannot run {addr2line}"))?;
    let text = String::from_utf8_lossy(&out.stdout);
    let src = src.canonicalize().unwrap_or_else(|_| src.to_path_buf());
    let src_s = src.to_string_lossy().to_string();
    // Per address: (function, file:line) frames, innermost first.
    let mut groups: Vec<(String, Vec<(String, String)>)> = Vec::new();
    let mut lines = text.lines().peekable();
    while let Some(l) = lines.next() {
        if let Some(hex) = l.strip_prefix("0x") {
            let callee = u64::from_str_radix(hex.trim(), 16).ok().and_then(|a| sites.get(&a)).cloned();
            groups.push((callee.unwrap_or_default(), Vec::new()));
            continue;
        }
        let loc = lines.next().unwrap_or("?").to_string();
        if let Some((_, g)) = groups.last_mut() {
            g.push((l.to_string(), loc));
        }
    }
    let mut found: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for (callee, g) in groups {
        let core_frame = g.iter().position(|(_, loc)| loc.starts_with(&src_s));
        let line = match core_frame {
            Some(k) => {
                let (func, loc) = &g[k];
                let loc = loc.strip_prefix(&src_s).unwrap_or(loc).trim_start_matches('/');
                let loc = loc.split(" (").next().unwrap_or(loc);
                let via = if k > 0 {
                    g[k - 1].0.clone()
                } else if is_panic_fn(&callee) {
                    String::new()
                } else {
                    callee
                };
                (format!("src/{loc} in {}", strip_generics(func)), via)
            }
            None => {
                let chain: Vec<String> = g.iter().map(|(f, l)| format!("{f} ({l})")).collect();
                (format!("outside the core: {}", chain.join(" <- ")), String::new())
            }
        };
        found.entry(line.0).or_default().insert(line.1);
    }
    // The merged panic call itself often has no line of its own.
    if found.len() > 1 {
        found.retain(|at, _| !at.contains(":? "));
    }
    Ok(found
        .into_iter()
        .map(|(at, via)| {
            let via: Vec<String> = via.into_iter().filter(|s| !s.is_empty()).collect();
            if via.is_empty() {
                at
            } else {
                format!("{at}: calls {}", via.join(", "))
            }
        })
        .collect())
}

/// `<a::B>::run::<i8, i16, ()>` -> `a::B::run` (the monomorphizations of
/// one source line are one finding).
fn strip_generics(f: &str) -> String {
    let mut out = String::new();
    let mut depth = 0usize;
    for c in f.chars() {
        match c {
            '<' => depth += 1,
            '>' => depth = depth.saturating_sub(1),
            _ if depth == 0 => out.push(c),
            _ => {}
        }
    }
    // `<a::B>::run` loses its qualified type with the brackets: keep it.
    let inner = f.strip_prefix('<').and_then(|r| r.split_once('>')).map(|(t, _)| t);
    let out = out.replace("::::", "::");
    match inner {
        Some(t) if !t.contains('<') => format!("{t}{}", out.trim_end_matches("::")),
        _ => out.trim_end_matches("::").to_string(),
    }
}

// ---------------------------------------------------------------- summary

const TARGET_ORDER: [&str; 4] =
    ["thumbv6m-none-eabi", "thumbv7m-none-eabi", "thumbv7em-none-eabihf", "thumbv8m.main-none-eabihf"];

fn target_rank(v: &Value) -> usize {
    let t = v.get("target").and_then(Value::as_str).unwrap_or("");
    TARGET_ORDER.iter().position(|x| *x == t).unwrap_or(TARGET_ORDER.len())
}

fn summary(json_path: &Path, md_path: &Path, steps: usize, files: &[PathBuf]) -> Result<()> {
    let mut runs: Vec<Value> = Vec::new();
    let mut proofs: Vec<Value> = Vec::new();
    for f in files {
        let text = std::fs::read_to_string(f).with_context(|| format!("{}: cannot read", f.display()))?;
        let v: Value = serde_json::from_str(&text).with_context(|| format!("{}: not JSON", f.display()))?;
        match v.get("kind").and_then(Value::as_str) {
            Some("run") => runs.push(v),
            Some("proof") => proofs.push(v),
            _ => bail!("{}: neither a run nor a proof record", f.display()),
        }
    }
    let order = |v: &Value| v.get("order").and_then(Value::as_str).and_then(|s| s.parse::<u32>().ok()).unwrap_or(0);
    runs.sort_by_key(|v| (target_rank(v), order(v)));
    proofs.sort_by_key(|v| (target_rank(v), v.get("profile").and_then(Value::as_str).unwrap_or("").to_string()));
    let all = json!({
        "schema": 1,
        "about": "Lapwing on emulated Cortex-M (QEMU, -icount shift=0): outputs bit-exact with the host, \
                  emulated instructions per step (a proxy for cycles: QEMU models no pipeline, caches or wait states), \
                  stack high-water of one step by stack painting, flash and RAM from the ELF (text+data, data+bss), \
                  and the panic-free link proof",
        "steps": steps,
        "command": "bash tools/firmware/check.sh",
        "runs": runs,
        "proof": proofs,
    });
    write_json(json_path, &all)?;

    let s = |v: &Value, k: &str| match v.get(k) {
        Some(Value::String(x)) => x.clone(),
        Some(Value::Null) | None => "-".into(),
        Some(x) => x.to_string(),
    };
    let thousands = |x: &str| -> String {
        let (int, frac) = x.split_once('.').map_or((x, None), |(a, b)| (a, Some(b)));
        if int.len() <= 3 || !int.chars().all(|c| c.is_ascii_digit()) {
            return x.to_string();
        }
        let mut out = String::new();
        for (i, c) in int.chars().enumerate() {
            if i > 0 && (int.len() - i) % 3 == 0 {
                out.push(',');
            }
            out.push(c);
        }
        frac.map_or(out.clone(), |f| format!("{out}.{f}"))
    };
    let mut md = String::new();
    md.push_str(
        "| target (CPU, QEMU board) | model | scheme | instructions / step | per MAC | stack B | flash B, minimal / measuring | RAM B, minimal / measuring | bit-exact steps | reproduce |\n\
         |---|---|---|---:|---:|---:|---:|---:|---|---|\n",
    );
    for r in &runs {
        let ips = s(r, "instructions_per_step");
        let ips = ips.parse::<f64>().map_or(ips.clone(), |x| thousands(&format!("{:.0}", x)));
        let _ = writeln!(
            md,
            "| {} ({}, {}) | {} | {}-{} | {} | {} | {} | {} / {} | {} / {} | {} | `{}` |",
            s(r, "target"),
            s(r, "cpu"),
            s(r, "board"),
            s(r, "model"),
            s(r, "scheme"),
            s(r, "cell"),
            ips,
            s(r, "instructions_per_mac").parse::<f64>().map_or("-".into(), |x| format!("{x:.2}")),
            s(r, "stack_step_bytes"),
            thousands(&s(r, "min_flash_bytes")),
            thousands(&s(r, "flash_bytes")),
            thousands(&s(r, "min_ram_bytes")),
            thousands(&s(r, "ram_bytes")),
            if r.get("bit_exact") == Some(&Value::Bool(true)) {
                format!("yes, {}", thousands(&s(r, "rows_compared")))
            } else {
                "**no**".into()
            },
            s(r, "command"),
        );
    }
    if !proofs.is_empty() {
        md.push_str(
            "\n| target | panic-free proof build | links (no panic path) | deliberate panic refused | ran | flash B | panic sites |\n\
             |---|---|---|---|---|---:|---|\n",
        );
        for p in &proofs {
            let yn = |k: &str| match p.get(k) {
                Some(Value::Bool(true)) => "yes",
                Some(Value::Bool(false)) => "**no**",
                _ => "-",
            };
            let sites: Vec<String> = p
                .get("panic_sites")
                .and_then(Value::as_array)
                .map(|a| {
                    a.iter()
                        .filter_map(Value::as_str)
                        .map(|x| x.split(':').take(2).collect::<Vec<_>>().join(":"))
                        .collect()
                })
                .unwrap_or_default();
            let sites: BTreeSet<String> =
                sites.into_iter().map(|x| x.split(" in ").next().unwrap_or("").to_string()).collect();
            let _ = writeln!(
                md,
                "| {} | {} | {} | {} | {} | {} | {} |",
                s(p, "target"),
                s(p, "profile"),
                yn("linked"),
                yn("canary_refused"),
                yn("ran"),
                thousands(&s(p, "flash_bytes")),
                if sites.is_empty() { "-".to_string() } else { sites.into_iter().collect::<Vec<_>>().join(", ") },
            );
        }
    }
    std::fs::write(md_path, &md).with_context(|| format!("{}: cannot write", md_path.display()))?;
    print!("{md}");
    Ok(())
}
