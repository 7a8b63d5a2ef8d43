//! `lapwing`: the host tool. Parses arguments, calls the library, prints, and
//! picks the exit status in one place: 0 success (or within budget), 1 budget
//! violated, 2 any error.
#![cfg_attr(
    not(test),
    deny(
        clippy::unwrap_used,
        clippy::expect_used,
        clippy::panic,
        clippy::unreachable,
        clippy::todo,
        clippy::indexing_slicing,
        clippy::print_stdout,
        clippy::print_stderr
    )
)]

use anyhow::Context;
use clap::{Parser, Subcommand, ValueEnum};
use lapwing::activation::TableKind;
use lapwing::quant::{CellWidth, Scheme};
use lapwing_tools::blob::{encode, LoadedBlob};
use lapwing_tools::budget::Budget;
use lapwing_tools::calibrate::RangeMethod;
use lapwing_tools::detector::{self, DetectOptions, DetectorOptions};
use lapwing_tools::fit::{self, FitOptions};
use lapwing_tools::import::{ImportOptions, Layout};
use lapwing_tools::pipeline::{self, NormSource, RunValues, Runnable};
use lapwing_tools::quantize::{quantize, QuantOptions};
use lapwing_tools::report::{self, ReportOptions};
use lapwing_tools::rounding::{quantize_data_aware, Rounding, RoundingOptions};
use lapwing_tools::scenario::{self, DataSet, Scenario};
use lapwing_tools::{codegen, data, demo, example, export, inspect, output, plot, sweep};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

/// Quantize float LSTM models to integer-only fixed point for microcontrollers,
/// and prove on the host how far they drift before flashing.
#[derive(Parser, Debug)]
#[command(name = "lapwing", version, propagate_version = true)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand, Debug)]
enum Command {
    /// Train a float next-step predictor (LSTM + dense head) on normal running data.
    Fit(FitArgs),
    /// Import a float model, calibrate it on data and write a device blob (.lwq).
    Quantize(QuantizeArgs),
    /// Run a float model or a blob over data step by step and write the outputs as CSV.
    Run(RunArgs),
    /// Report float vs quantized error on the same data, tensor by tensor; check an error budget.
    Report(ReportArgs),
    /// Quantize with every scheme, cell and table; report each; recommend the smallest within budget.
    Sweep(SweepArgs),
    /// Show what is in a blob: scheme, shapes, sections, flash, RAM, work per step.
    Inspect(InspectArgs),
    /// Run the blob's fixed-point anomaly detector over data; print alarms and, with labels, the confusion.
    Detect(DetectArgs),
    /// Generate a Rust module embedding a blob in an aligned static, with its sizes as constants.
    Codegen(CodegenArgs),
    /// Generate a scenario's labelled data sets (the invented ventilation line of demo-data/).
    Simulate(SimulateArgs),
    /// The whole pipeline on the shipped demo scenario: data, quantize, report, detect, codegen.
    Demo(DemoArgs),
    /// Quantize and compare on the built-in random example (no files needed).
    Example(ExampleArgs),
}

/// Options of `fit`.
#[derive(clap::Args, Debug)]
struct FitArgs {
    /// Training data of normal running: CSV with a header (a `label` column is ignored), or .npy [T, X].
    #[arg(long, help_heading = "Input")]
    train: PathBuf,
    /// Output float model (.safetensors, Lapwing's layout with the input normalization), written atomically.
    #[arg(short, long, help_heading = "Output")]
    output: PathBuf,
    /// Hidden units per LSTM layer.
    #[arg(long, default_value_t = 32, help_heading = "Model")]
    hidden: usize,
    /// Stacked LSTM layers.
    #[arg(long, default_value_t = 1, help_heading = "Model")]
    layers: usize,
    /// Truncated-BPTT window, in steps.
    #[arg(long, default_value_t = 64, help_heading = "Training")]
    window: usize,
    /// Streams trained in parallel (one optimizer step per window over all of them).
    #[arg(long, default_value_t = 16, help_heading = "Training")]
    batch: usize,
    /// Largest number of epochs.
    #[arg(long, default_value_t = 30, help_heading = "Training")]
    epochs: usize,
    /// Stop after this many epochs in a row without a lower validation loss.
    #[arg(long, default_value_t = 4, help_heading = "Training")]
    patience: usize,
    /// Adam learning rate.
    #[arg(long, default_value_t = 1e-3, help_heading = "Training")]
    lr: f32,
    /// Clip the global gradient norm to this value (0 disables clipping).
    #[arg(long, default_value_t = 1.0, help_heading = "Training")]
    clip: f32,
    /// Fraction of the rows, taken from the end, held out for validation.
    #[arg(long, default_value_t = 0.1, help_heading = "Training")]
    val_fraction: f32,
    /// Seed of the weight initialization (same seed and data, same model).
    #[arg(long, default_value_t = 0, help_heading = "Training")]
    seed: u64,
}

/// Options of `simulate`.
#[derive(clap::Args, Debug)]
struct SimulateArgs {
    /// Scenario file (TOML), e.g. demo-data/scenario.toml.
    scenario: PathBuf,
    /// Which data set: train (normal running), calib (normal, another seed), test (faults injected), sample.
    #[arg(long, default_value = "test", help_heading = "Input")]
    set: String,
    /// Output file: .csv (features then a 0/1 `label` column) or .npy (float32 [T, 4], no labels).
    #[arg(short, long, help_heading = "Output")]
    output: PathBuf,
    /// Also write the fault events (kind, start, end rows) as JSON to this file (`-` for standard output).
    #[arg(long, help_heading = "Output")]
    events: Option<PathBuf>,
}

#[derive(Clone, Copy, Debug, ValueEnum)]
enum SchemeArg {
    /// int8 weights, int16 hidden state (default).
    W8a16,
    /// int8 weights, int8 hidden state: least RAM.
    W8a8,
    /// int16 weights, int16 hidden state: highest fidelity.
    W16a16,
}

fn scheme_of(s: SchemeArg) -> Scheme {
    match s {
        SchemeArg::W8a16 => Scheme::W8A16,
        SchemeArg::W8a8 => Scheme::W8A8,
        SchemeArg::W16a16 => Scheme::W16A16,
    }
}

#[derive(Clone, Copy, Debug, ValueEnum)]
enum CellArg {
    /// 16-bit cell state (least RAM).
    C16,
    /// 32-bit cell state (long-memory models).
    C32,
}

#[derive(Clone, Copy, Debug, ValueEnum)]
enum TableArg {
    /// 1,072-byte activation table (within 1.5 LSB).
    Standard,
    /// 304-byte activation table for tight flash (within 7 LSB).
    Compact,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
enum RoundingArg {
    /// Each weight to its nearest step.
    Nearest,
    /// Column by column, each rounding error spread over the columns not yet rounded, weighted by the
    /// calibration data's input statistics (GPTQ-style, Frantar et al. 2022); typically several dB better.
    Compensated,
}

fn rounding_of(r: RoundingArg) -> Rounding {
    match r {
        RoundingArg::Nearest => Rounding::Nearest,
        RoundingArg::Compensated => Rounding::Compensated,
    }
}

#[derive(Clone, Copy, Debug, ValueEnum)]
enum LayoutArg {
    /// Lapwing's own names: layers.{k}.w_x, layers.{k}.w_h, layers.{k}.b, head.w, head.b.
    Lapwing,
    /// Separate input/recurrent weights and biases: `PREFIX.weight_ih_l{k}`, ... (gates i,f,g,o).
    Split,
    /// Kernels [X, 4H], recurrent kernels [H, 4H], one bias (gates i,f,c,o).
    Fused,
}

#[derive(Clone, Copy, Debug, ValueEnum)]
enum NormArg {
    /// Use norm.mean/norm.std from the model file when present.
    File,
    /// Standardize with the mean and std of the calibration data.
    Data,
    /// No input normalization.
    None,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, ValueEnum)]
enum RangeArg {
    /// Largest magnitude seen (never clips calibration data).
    Minmax,
    /// A percentile of the magnitudes (see --percentile): ignores rare outliers.
    Percentile,
}

/// How to read a float model file.
#[derive(clap::Args, Debug)]
struct ModelArgs {
    /// Tensor layout of the float model (detected when omitted).
    #[arg(long, value_enum, help_heading = "Float model")]
    layout: Option<LayoutArg>,
    /// Name prefix of the LSTM tensors (split layout) or layer groups (fused layout); found when omitted.
    #[arg(long, help_heading = "Float model")]
    prefix: Option<String>,
    /// Name prefix of the dense head's tensors (split or fused layout); found when omitted.
    #[arg(long, help_heading = "Float model")]
    head_prefix: Option<String>,
    /// Input normalization folded into layer 0 before quantizing.
    #[arg(long, value_enum, default_value = "file", help_heading = "Float model")]
    norm: NormArg,
}

impl ModelArgs {
    fn import_options(&self) -> ImportOptions {
        ImportOptions {
            layout: self.layout.map(|l| match l {
                LayoutArg::Lapwing => Layout::Lapwing,
                LayoutArg::Split => Layout::Split,
                LayoutArg::Fused => Layout::Fused,
            }),
            prefix: self.prefix.clone(),
            head_prefix: self.head_prefix.clone(),
        }
    }

    fn norm(&self) -> NormSource {
        match self.norm {
            NormArg::File => NormSource::File,
            NormArg::Data => NormSource::Data,
            NormArg::None => NormSource::None,
        }
    }
}

/// Options of `quantize`.
#[derive(clap::Args, Debug)]
struct QuantizeArgs {
    /// Float model: .safetensors, .npz, a directory of .npy files, or .onnx.
    model: PathBuf,
    /// Calibration data (normal running): CSV with a header, or .npy [T, X].
    #[arg(long, help_heading = "Input")]
    calib: PathBuf,
    /// Output blob (.lwq), written atomically.
    #[arg(short, long, help_heading = "Output")]
    output: PathBuf,
    #[command(flatten)]
    model_args: ModelArgs,
    /// Integer scheme: weight and hidden-state widths.
    #[arg(long, value_enum, default_value = "w8a16", help_heading = "Scheme")]
    scheme: SchemeArg,
    /// Cell state width.
    #[arg(long, value_enum, default_value = "c16", help_heading = "Scheme")]
    cell: CellArg,
    /// Activation lookup table.
    #[arg(long, value_enum, default_value = "standard", help_heading = "Scheme")]
    table: TableArg,
    /// How ranges are taken from the calibration data.
    #[arg(long, value_enum, default_value = "minmax", help_heading = "Calibration")]
    range: RangeArg,
    /// Percentile of |value| used by --range percentile.
    #[arg(long, default_value_t = 99.99, help_heading = "Calibration")]
    percentile: f64,
    /// How weights are rounded to integers.
    #[arg(long, value_enum, default_value = "nearest", help_heading = "Scheme")]
    rounding: RoundingArg,
    /// Shift each bias by the expected pre-activation error of its row's rounded weights over the calibration data.
    #[arg(long, help_heading = "Scheme")]
    bias_correction: bool,
    /// Headroom factor above the calibrated range (>= 1).
    #[arg(long, default_value_t = 1.25, help_heading = "Calibration")]
    headroom: f32,
    #[command(flatten)]
    detector: DetectorArgs,
}

/// Anomaly-detector calibration options of `quantize`.
#[derive(clap::Args, Debug)]
struct DetectorArgs {
    /// Calibrate an anomaly detector on the calibration data (normal running) and store it in the blob;
    /// the model must be a next-step predictor (one head output per input).
    #[arg(long, help_heading = "Detector")]
    detector: bool,
    /// Quantile of normal smoothed scores the alarm level starts from.
    #[arg(long, default_value_t = DetectorOptions::DEFAULT.quantile, help_heading = "Detector")]
    detect_quantile: f64,
    /// Factor above that quantile for the alarm level.
    #[arg(long, default_value_t = DetectorOptions::DEFAULT.margin, help_heading = "Detector")]
    detect_margin: f64,
    /// Clear level as a fraction of the alarm level (hysteresis).
    #[arg(long, default_value_t = DetectorOptions::DEFAULT.hysteresis, help_heading = "Detector")]
    detect_hysteresis: f64,
    /// Samples above the level, out of the last --detect-n, that raise the alarm.
    #[arg(long, default_value_t = DetectorOptions::DEFAULT.k_of, help_heading = "Detector")]
    detect_k: u8,
    /// Decision window in samples.
    #[arg(long, default_value_t = DetectorOptions::DEFAULT.window, help_heading = "Detector")]
    detect_n: u8,
    /// EWMA smoothing shift s: each sample weighs 2^-s.
    #[arg(long, default_value_t = DetectorOptions::DEFAULT.ewma_shift, help_heading = "Detector")]
    detect_smoothing: u8,
    /// Samples at the start that never raise an alarm (state settling).
    #[arg(long, default_value_t = DetectorOptions::DEFAULT.warmup, help_heading = "Detector")]
    detect_warmup: u32,
}

impl DetectorArgs {
    fn options(&self) -> DetectorOptions {
        DetectorOptions {
            quantile: self.detect_quantile,
            margin: self.detect_margin,
            hysteresis: self.detect_hysteresis,
            k_of: self.detect_k,
            window: self.detect_n,
            ewma_shift: self.detect_smoothing,
            warmup: self.detect_warmup,
        }
    }
}

/// Options of `detect`.
#[derive(clap::Args, Debug)]
struct DetectArgs {
    /// A blob with a detector (`quantize --detector`).
    blob: PathBuf,
    /// Data: CSV with a header (an optional `label` column of 0/1 gives the event-level confusion), or .npy.
    #[arg(long, help_heading = "Input")]
    data: PathBuf,
    /// Sample rate of the data in Hz, for false alarms per hour.
    #[arg(long, default_value_t = 400.0, help_heading = "Input")]
    sample_rate: f64,
    /// Seconds after a labelled fault's end during which an alarm still counts as detecting it.
    #[arg(long, default_value_t = 1.0, help_heading = "Input")]
    grace: f64,
    /// Write the result as JSON to this file (`-` for standard output).
    #[arg(long, help_heading = "Output")]
    json: Option<PathBuf>,
}

/// Options of `run`.
#[derive(clap::Args, Debug)]
struct RunArgs {
    /// A device blob (.lwq) or a float model (.safetensors, .npz, .npy directory, .onnx).
    model: PathBuf,
    /// Input data: CSV with a header, or .npy [T, X].
    #[arg(long, help_heading = "Input")]
    data: PathBuf,
    /// Output CSV, one row per input row (head outputs, or the last hidden state).
    #[arg(short, long, help_heading = "Output")]
    output: PathBuf,
    /// Write the blob's raw int16 outputs instead of real values.
    #[arg(long, help_heading = "Output")]
    int: bool,
    /// The data holds raw int16 device inputs (no scaling); implies --int.
    #[arg(long, help_heading = "Input")]
    raw_input: bool,
    #[command(flatten)]
    model_args: ModelArgs,
    /// Data for --norm data (the calibration data the blob was made from).
    #[arg(long, help_heading = "Float model")]
    norm_data: Option<PathBuf>,
}

/// Options of `report`.
#[derive(clap::Args, Debug)]
struct ReportArgs {
    /// The device blob (.lwq).
    blob: PathBuf,
    /// The float model the blob was made from (.safetensors, .npz, .npy directory, .onnx).
    #[arg(long = "float", help_heading = "Input")]
    float_model: PathBuf,
    /// Data to compare on: CSV with a header, or .npy [T, X] (ideally not the calibration data).
    #[arg(long, help_heading = "Input")]
    data: PathBuf,
    #[command(flatten)]
    model_args: ModelArgs,
    /// Data for --norm data (the calibration data the blob was made from).
    #[arg(long, help_heading = "Float model")]
    norm_data: Option<PathBuf>,
    /// Error budget (TOML): exit status 1 when a limit is violated.
    #[arg(long, help_heading = "Checks")]
    budget: Option<PathBuf>,
    /// Write the report as JSON to this file (`-` for standard output).
    #[arg(long, help_heading = "Output")]
    json: Option<PathBuf>,
    /// Write SVG plots (output trace, error over time, gate error histograms) into this directory.
    #[arg(long, help_heading = "Output")]
    plot: Option<PathBuf>,
    /// Steps per window of the error-over-time figures (default: a hundredth of the data).
    #[arg(long, help_heading = "Output")]
    window: Option<usize>,
    /// Window of the output trace plot as START:LEN in steps (default: up to 500 steps of the worst window).
    #[arg(long, value_parser = parse_trace, help_heading = "Output")]
    trace: Option<(usize, usize)>,
}

fn parse_trace(s: &str) -> Result<(usize, usize), String> {
    let (a, b) = s.split_once(':').ok_or("expected START:LEN, e.g. 1000:500")?;
    let start = a.trim().parse().map_err(|_| format!("START `{a}` is not a step number"))?;
    let len: usize = b.trim().parse().map_err(|_| format!("LEN `{b}` is not a number of steps"))?;
    if len == 0 {
        return Err("LEN must be at least 1".into());
    }
    Ok((start, len))
}

/// Options of `sweep`.
#[derive(clap::Args, Debug)]
struct SweepArgs {
    /// Float model (.safetensors, .npz, .npy directory, .onnx).
    model: PathBuf,
    /// Calibration data (normal running).
    #[arg(long, help_heading = "Input")]
    calib: PathBuf,
    /// Data every configuration is reported on (ideally not the calibration data).
    #[arg(long, help_heading = "Input")]
    data: PathBuf,
    #[command(flatten)]
    model_args: ModelArgs,
    /// Headroom factor above the calibrated range (>= 1).
    #[arg(long, default_value_t = 1.25, help_heading = "Calibration")]
    headroom: f32,
    /// Error budget (TOML): rows within it are marked and the smallest is recommended.
    #[arg(long, help_heading = "Checks")]
    budget: Option<PathBuf>,
    /// Emulated measurements of the firmware check (`target/firmware/measurements.json`, written by
    /// `tools/firmware/check.sh`): instruction counts are scaled from them instead of the formula.
    #[arg(long, requires = "target", help_heading = "Checks")]
    firmware: Option<PathBuf>,
    /// The target whose measurements `--firmware` uses (e.g. thumbv7em-none-eabihf).
    #[arg(long, requires = "firmware", help_heading = "Checks")]
    target: Option<String>,
    /// Weight roundings to try, comma-separated (each with every scheme, cell and table).
    #[arg(long, value_enum, value_delimiter = ',', default_value = "nearest,compensated", help_heading = "Scheme")]
    rounding: Vec<RoundingArg>,
    /// Write the sweep as JSON to this file (`-` for standard output).
    #[arg(long, help_heading = "Output")]
    json: Option<PathBuf>,
}

/// Options of `inspect`.
#[derive(clap::Args, Debug)]
struct InspectArgs {
    /// The blob (.lwq).
    blob: PathBuf,
    /// Print JSON instead of a table.
    #[arg(long)]
    json: bool,
}

/// Options of `codegen`.
#[derive(clap::Args, Debug)]
struct CodegenArgs {
    /// The blob (.lwq).
    blob: PathBuf,
    /// Output Rust module (.rs), written atomically.
    #[arg(short, long)]
    output: PathBuf,
}

/// Options of `demo`.
#[derive(clap::Args, Debug)]
struct DemoArgs {
    /// Output directory (created if missing; files in it are replaced).
    #[arg(long, default_value = "demo-out")]
    out: PathBuf,
    /// Fit a new float model on the generated training set instead of using the shipped weights.
    #[arg(long)]
    refit: bool,
    /// The demo-data directory (scenario.toml and model.safetensors).
    #[arg(long, default_value = "demo-data")]
    demo_data: PathBuf,
    /// How the quantizer rounds weights.
    #[arg(long, value_enum, default_value = "compensated")]
    rounding: RoundingArg,
    /// Print the summary as JSON instead of text.
    #[arg(long)]
    json: bool,
}

/// Options of `example`.
#[derive(clap::Args, Debug)]
struct ExampleArgs {
    /// Integer scheme.
    #[arg(long, value_enum, default_value = "w8a16", help_heading = "Scheme")]
    scheme: SchemeArg,
    /// Cell state width.
    #[arg(long, value_enum, default_value = "c16", help_heading = "Scheme")]
    cell: CellArg,
    /// Activation lookup table.
    #[arg(long, value_enum, default_value = "standard", help_heading = "Scheme")]
    table: TableArg,
    /// Steps compared (the model is calibrated on a separate 20,000 steps).
    #[arg(long, default_value_t = 100_000, help_heading = "Input")]
    steps: usize,
    /// Print the result as JSON instead of a table.
    #[arg(long, help_heading = "Output")]
    json: bool,
}

/// Writes to standard output; a closed pipe (`lapwing report ... | head`)
/// ends the output quietly instead of panicking.
fn emit(text: &str) {
    use std::io::Write;
    let mut out = std::io::stdout().lock();
    let _ = out.write_all(text.as_bytes()).and_then(|()| out.flush());
}

/// Writes to standard error; a closed stderr (`lapwing ... 2>&1 | head`)
/// loses the text instead of panicking as `eprintln!` would.
fn emit_err(text: &str) {
    use std::io::Write;
    let _ = std::io::stderr().lock().write_all(text.as_bytes());
}

macro_rules! out {
    ($($arg:tt)*) => { emit(&format!($($arg)*)) };
}

macro_rules! outln {
    ($($arg:tt)*) => { emit(&(format!($($arg)*) + "\n")) };
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    match run(cli) {
        Ok(code) => code,
        Err(e) => {
            emit_err(&format!("lapwing: error: {e:#}\n"));
            ExitCode::from(2)
        }
    }
}

fn run(cli: Cli) -> anyhow::Result<ExitCode> {
    match cli.command {
        Command::Fit(args) => fit_cmd(&args),
        Command::Quantize(args) => quantize_cmd(&args),
        Command::Run(args) => run_cmd(&args),
        Command::Report(args) => report_cmd(&args),
        Command::Sweep(args) => sweep_cmd(&args),
        Command::Inspect(args) => inspect_cmd(&args),
        Command::Detect(args) => detect_cmd(&args),
        Command::Codegen(args) => codegen_cmd(&args),
        Command::Simulate(args) => simulate_cmd(&args),
        Command::Demo(args) => demo_cmd(&args),
        Command::Example(args) => example_cmd(&args),
    }
}

fn cell_width(c: CellArg) -> CellWidth {
    match c {
        CellArg::C16 => CellWidth::C16,
        CellArg::C32 => CellWidth::C32,
    }
}

fn table_kind(t: TableArg) -> TableKind {
    match t {
        TableArg::Standard => TableKind::Standard,
        TableArg::Compact => TableKind::Compact,
    }
}

fn quantize_cmd(a: &QuantizeArgs) -> anyhow::Result<ExitCode> {
    if !(a.headroom.is_finite() && a.headroom >= 1.0) {
        anyhow::bail!("--headroom {} must be a number >= 1", a.headroom);
    }
    if a.range == RangeArg::Percentile && !(a.percentile > 0.0 && a.percentile <= 100.0) {
        anyhow::bail!("--percentile {} must be in (0, 100]", a.percentile);
    }
    let det_opts = a.detector.options();
    if a.detector.detector {
        det_opts.validate().map_err(|e| anyhow::anyhow!("--detect-*: {e}"))?;
    }
    let method = match a.range {
        RangeArg::Minmax => RangeMethod::MinMax,
        RangeArg::Percentile => RangeMethod::Percentile(a.percentile),
    };
    let opts = QuantOptions {
        scheme: scheme_of(a.scheme),
        cell: cell_width(a.cell),
        table: table_kind(a.table),
        headroom: a.headroom,
    };
    let prep = pipeline::prepare(&a.model, &a.model_args.import_options(), a.model_args.norm(), Some(&a.calib), true)?;
    outln!("{}", prep.imported.summary());
    if prep.folded.is_some() {
        outln!("input normalization folded into layer 0 ({})", norm_origin(a.model_args.norm(), &a.calib));
    }
    let ranges = pipeline::calibrate_file(&prep.model, &a.calib, method, true)?;
    outln!("calibrated on {} rows of {} ({})", ranges.steps, a.calib.display(), range_name(method));
    let ropts = RoundingOptions {
        rounding: rounding_of(a.rounding),
        bias_correction: a.bias_correction,
        progress: true,
        ..RoundingOptions::default()
    };
    let calib_rows =
        if a.detector.detector || ropts.needs_data() { Some(data::read(&a.calib, false)?.rows) } else { None };
    let mut q = match &calib_rows {
        Some(rows) if ropts.needs_data() => quantize_data_aware(&prep.model, &ranges, &opts, &ropts, rows)
            .with_context(|| {
                format!(
                    "{}: quantization with {} rounding on {}",
                    a.model.display(),
                    ropts.rounding.name(),
                    a.calib.display()
                )
            })?,
        _ => quantize(&prep.model, &ranges, &opts).with_context(|| format!("{}: quantization", a.model.display()))?,
    };
    if ropts.needs_data() {
        outln!(
            "weights rounded: {}{}",
            ropts.rounding.name(),
            if ropts.bias_correction { ", biases corrected" } else { "" }
        );
    }
    if let (true, Some(rows)) = (a.detector.detector, &calib_rows) {
        let p = detector::calibrate(&prep.model, rows, &det_opts)
            .with_context(|| format!("{}: detector calibration", a.calib.display()))?;
        q.detector = Some(detector::to_fixed(&p, &q.input_scale, &q.output_scale)?);
        outln!(
            "detector: alarm above {:.2} (clear below {:.2}) smoothed squared standard units, {} of {} samples",
            p.raise,
            p.clear,
            p.k_of,
            p.window
        );
    }
    let bytes = encode(&q)?;
    output::write_atomic(&a.output, &bytes)?;
    let blob = LoadedBlob::read(&a.output)?;
    let info = inspect::inspect(&blob.parse()?);
    let f = &info.footprint;
    outln!(
        "wrote {}: scheme {} {}, {} B blob + {} B table flash, {} B RAM, {} MACs per step",
        a.output.display(),
        info.scheme,
        info.cell,
        f.blob_bytes,
        f.table_bytes,
        f.ram_bytes,
        f.macs_per_step
    );
    Ok(ExitCode::SUCCESS)
}

fn norm_origin(n: NormSource, calib: &Path) -> String {
    match n {
        NormSource::Data => format!("mean and std of {}", calib.display()),
        _ => "norm.mean and norm.std from the model file".to_string(),
    }
}

fn range_name(m: RangeMethod) -> String {
    match m {
        RangeMethod::MinMax => "min/max ranges".to_string(),
        RangeMethod::Percentile(p) => format!("{p}th-percentile ranges"),
    }
}

fn run_cmd(a: &RunArgs) -> anyhow::Result<ExitCode> {
    let lwq = a.model.extension().is_some_and(|e| e.eq_ignore_ascii_case("lwq"));
    let model = if lwq || pipeline::is_blob(&a.model) {
        Runnable::Blob(LoadedBlob::read(&a.model)?)
    } else {
        Runnable::Float(Box::new(float_for(&a.model, &a.model_args, a.norm_data.as_deref())?))
    };
    let values = match (a.raw_input, a.int) {
        (true, _) => RunValues::RawIo,
        (false, true) => RunValues::Int,
        (false, false) => RunValues::Real,
    };
    let n = pipeline::run_file(&model, &a.data, &a.output, values, true)?;
    emit_err(&format!("wrote {} rows to {}\n", n, a.output.display()));
    Ok(ExitCode::SUCCESS)
}

/// Writes `value` as JSON to `path` (atomically) or to stdout for `-`.
fn write_json(path: &Path, value: &impl serde::Serialize) -> anyhow::Result<()> {
    let text = serde_json::to_string_pretty(value)? + "\n";
    if path.as_os_str() == "-" {
        out!("{text}");
        Ok(())
    } else {
        output::write_text(path, &text)
    }
}

fn float_for(model: &Path, args: &ModelArgs, norm_data: Option<&Path>) -> anyhow::Result<pipeline::Prepared> {
    let norm = args.norm();
    if norm == NormSource::Data && norm_data.is_none() {
        anyhow::bail!("--norm data needs --norm-data PATH (the data the normalization was computed from)");
    }
    pipeline::prepare(model, &args.import_options(), norm, norm_data, true)
}

fn report_cmd(a: &ReportArgs) -> anyhow::Result<ExitCode> {
    // Everything that can be refused is checked before the long run.
    let budget = a.budget.as_deref().map(Budget::load).transpose()?;
    if let Some(dir) = &a.plot {
        if !dir.is_dir() {
            anyhow::bail!("--plot {}: the directory does not exist", dir.display());
        }
    }
    if a.window == Some(0) {
        anyhow::bail!("--window must be at least 1 step");
    }
    let blob = LoadedBlob::read(&a.blob)?;
    let parsed = blob.parse()?;
    if budget.as_ref().is_some_and(|b| b.alarm_agreement_min.is_some()) && parsed.detector().is_none() {
        anyhow::bail!(
            "{}: the budget sets alarm_agreement_min but the blob has no detector (quantize with --detector)",
            a.blob.display()
        );
    }
    if let Some(p) = a.json.as_deref().filter(|p| p.as_os_str() != "-") {
        let dir = p.parent().filter(|d| !d.as_os_str().is_empty()).unwrap_or(Path::new("."));
        if !dir.is_dir() {
            anyhow::bail!("--json {}: the directory {} does not exist", p.display(), dir.display());
        }
    }
    let prep = float_for(&a.float_model, &a.model_args, a.norm_data.as_deref())?;
    let opts = ReportOptions { window: a.window, trace: a.trace };
    let mut report = report::report_file(&prep.model, &parsed, &a.data, &opts, true)?;
    if let Some(b) = &budget {
        report.budget = b.check(&report)?;
    }
    let to_stdout = a.json.as_deref().is_some_and(|p| p.as_os_str() == "-");
    if !to_stdout {
        out!("{}", report.to_text());
    }
    // Plots first: if one cannot be written, no JSON is left behind either.
    if let Some(dir) = &a.plot {
        let target = budget.as_ref().and_then(|b| b.output_sqnr_min_db);
        let written = plot::write_plots(&report, dir, target)?;
        if !to_stdout {
            for p in written {
                outln!("plot: {}", p.display());
            }
        }
    }
    if let Some(p) = &a.json {
        write_json(p, &report)?;
    }
    Ok(if report.budget.passed { ExitCode::SUCCESS } else { ExitCode::from(1) })
}

fn sweep_cmd(a: &SweepArgs) -> anyhow::Result<ExitCode> {
    if !(a.headroom.is_finite() && a.headroom >= 1.0) {
        anyhow::bail!("--headroom {} must be a number >= 1", a.headroom);
    }
    let budget = a.budget.as_deref().map(Budget::load).transpose()?;
    let measured = match (&a.firmware, &a.target) {
        (Some(f), Some(t)) => Some(sweep::MeasuredCost::load(f, t)?),
        _ => None,
    };
    let prep = pipeline::prepare(&a.model, &a.model_args.import_options(), a.model_args.norm(), Some(&a.calib), true)?;
    let ranges = pipeline::calibrate_file(&prep.model, &a.calib, RangeMethod::MinMax, true)?;
    let data = data::read(&a.data, true)?;
    data.expect_features(prep.model.input_len())?;
    let mut roundings: Vec<Rounding> = a.rounding.iter().map(|r| rounding_of(*r)).collect();
    roundings.dedup();
    let calib_rows =
        if roundings.iter().any(|r| *r != Rounding::Nearest) { data::read(&a.calib, false)?.rows } else { Vec::new() };
    let total = sweep::count(a.headroom, &roundings) as u64;
    let bar = indicatif::ProgressBar::new(total).with_style(
        indicatif::ProgressStyle::with_template("{msg} [{bar:30}] {pos}/{len} configurations")
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    bar.set_message("sweep");
    let input = sweep::SweepInput {
        ranges: &ranges,
        calib_rows: &calib_rows,
        rows: &data.rows,
        headroom: a.headroom,
        roundings: &roundings,
        budget: budget.as_ref(),
        measured: measured.as_ref(),
    };
    let result = sweep::sweep(&prep.model, &input, |done, _| bar.set_position(done as u64));
    bar.finish_and_clear();
    let result = result?;
    let to_stdout = a.json.as_deref().is_some_and(|p| p.as_os_str() == "-");
    if !to_stdout {
        out!("{}", result.to_text());
    }
    if let Some(p) = &a.json {
        write_json(p, &result)?;
    }
    // Exit 1 when a budget was given and no configuration meets it.
    Ok(if result.budget_checked && result.recommended.is_none() { ExitCode::from(1) } else { ExitCode::SUCCESS })
}

fn detect_cmd(a: &DetectArgs) -> anyhow::Result<ExitCode> {
    if !(a.sample_rate.is_finite() && a.sample_rate > 0.0) {
        anyhow::bail!("--sample-rate {} must be a positive number of Hz", a.sample_rate);
    }
    if !(a.grace.is_finite() && a.grace >= 0.0) {
        anyhow::bail!("--grace {} must be a non-negative number of seconds", a.grace);
    }
    let blob = LoadedBlob::read(&a.blob)?;
    let parsed = blob.parse()?;
    let opts = DetectOptions { sample_rate_hz: a.sample_rate, grace_s: a.grace };
    let result = detector::detect_file(&parsed, &a.data, &opts, true)
        .map_err(|e| anyhow::anyhow!("{}: {e:#}", a.blob.display()))?;
    let to_stdout = a.json.as_deref().is_some_and(|p| p.as_os_str() == "-");
    if !to_stdout {
        out!("{}", result.to_text(&opts));
    }
    if let Some(p) = &a.json {
        write_json(p, &result)?;
    }
    Ok(ExitCode::SUCCESS)
}

fn inspect_cmd(a: &InspectArgs) -> anyhow::Result<ExitCode> {
    let blob = LoadedBlob::read(&a.blob)?;
    let info = inspect::inspect(&blob.parse()?);
    if a.json {
        outln!("{}", serde_json::to_string_pretty(&info)?);
    } else {
        out!("{}", info.to_text());
    }
    Ok(ExitCode::SUCCESS)
}

fn codegen_cmd(a: &CodegenArgs) -> anyhow::Result<ExitCode> {
    let blob = LoadedBlob::read(&a.blob)?;
    let info = inspect::inspect(&blob.parse()?);
    let name = a.blob.file_name().map_or_else(|| a.blob.display().to_string(), |n| n.to_string_lossy().into_owned());
    let src = codegen::module(blob.bytes(), &info, &name);
    output::write_text(&a.output, &src)?;
    outln!(
        "wrote {} ({} B blob, {} state words)",
        a.output.display(),
        info.footprint.blob_bytes,
        info.footprint.state_words
    );
    Ok(ExitCode::SUCCESS)
}

fn fit_cmd(a: &FitArgs) -> anyhow::Result<ExitCode> {
    output::check_destination(&a.output)?;
    let opts = FitOptions {
        hidden: a.hidden,
        layers: a.layers,
        window: a.window,
        batch: a.batch,
        epochs: a.epochs,
        patience: a.patience,
        lr: a.lr,
        clip: a.clip,
        val_fraction: a.val_fraction,
        seed: a.seed,
        progress: true,
    };
    let data = data::read(&a.train, true)?;
    let r = fit::fit(&data.rows, &opts).map_err(|e| anyhow::anyhow!("{}: {e:#}", a.train.display()))?;
    export::save_safetensors(&r.model, Some(&r.norm), &a.output)?;
    out!("{}", r.to_text());
    outln!("wrote {}", a.output.display());
    Ok(ExitCode::SUCCESS)
}

fn simulate_cmd(a: &SimulateArgs) -> anyhow::Result<ExitCode> {
    let Some(set) = DataSet::from_name(&a.set) else {
        anyhow::bail!("--set {}: unknown data set (accepted: train, calib, test, sample)", a.set);
    };
    output::check_destination(&a.output)?;
    if let Some(p) = a.events.as_deref().filter(|p| p.as_os_str() != "-") {
        output::check_destination(p)?;
    }
    let scen = Scenario::load(&a.scenario)?;
    let g = scenario::generate(&scen, set).map_err(|e| anyhow::anyhow!("{}: {e:#}", a.scenario.display()))?;
    scenario::write(&g, &a.output)?;
    let events: Vec<serde_json::Value> =
        g.events.iter().map(|e| serde_json::json!({"kind": e.kind.name(), "start": e.start, "end": e.end})).collect();
    if a.events.as_deref().is_none_or(|p| p.as_os_str() != "-") {
        outln!(
            "wrote {}: {} set, {} rows x {} features at {} Hz ({:.1} min), {} fault events, content hash {:#018x}",
            a.output.display(),
            set.name(),
            g.rows.len(),
            g.columns.len(),
            g.sample_rate_hz,
            g.rows.len() as f64 / f64::from(g.sample_rate_hz) / 60.0,
            g.events.len(),
            scenario::content_hash(&g)
        );
        for e in &g.events {
            outln!("  {:<14} rows {}..{}", e.kind.name(), e.start, e.end);
        }
    }
    if let Some(p) = &a.events {
        write_json(p, &events)?;
    }
    Ok(ExitCode::SUCCESS)
}

fn demo_cmd(a: &DemoArgs) -> anyhow::Result<ExitCode> {
    let opts = demo::DemoOptions {
        demo_data: a.demo_data.clone(),
        out: a.out.clone(),
        refit: a.refit,
        rounding: rounding_of(a.rounding),
        verbose: true,
    };
    let summary = demo::run(&opts)?;
    if a.json {
        outln!("{}", serde_json::to_string_pretty(&summary)?);
    } else {
        out!("{}", summary.to_text(&a.out));
    }
    Ok(ExitCode::SUCCESS)
}

fn example_cmd(args: &ExampleArgs) -> anyhow::Result<ExitCode> {
    if args.steps == 0 {
        anyhow::bail!("--steps must be at least 1");
    }
    let opts = QuantOptions {
        scheme: scheme_of(args.scheme),
        cell: cell_width(args.cell),
        table: table_kind(args.table),
        ..Default::default()
    };
    let report = example::run(&opts, example::CALIB_STEPS, args.steps)?;
    if args.json {
        outln!("{}", serde_json::to_string_pretty(&report)?);
    } else {
        outln!("Built-in example: random LSTM X=4 H=32 + head Y=4 on a random-walk signal (invented data)");
        out!("{}", report.to_text());
    }
    Ok(ExitCode::SUCCESS)
}
