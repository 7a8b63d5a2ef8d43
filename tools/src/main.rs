//! `lapwing`: the host tool. Parses arguments, calls the library, prints, and
//! picks the exit status in one place: 0 success (or within budget), 1 budget
//! violated, 2 any error.

use clap::{Parser, Subcommand, ValueEnum};
use lapwing::activation::TableKind;
use lapwing::quant::CellWidth;
use lapwing_tools::example;
use lapwing_tools::quantize::QuantOptions;
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
    /// Train a next-step predictor on normal data (not implemented yet).
    Fit(Planned),
    /// Quantize a float model to a device blob (not implemented yet).
    Quantize(Planned),
    /// Run a float model or a blob over data and write outputs (not implemented yet).
    Run(Planned),
    /// Report float vs quantized error on the same data (not implemented yet).
    Report(Planned),
    /// Sweep schemes and options against a budget (not implemented yet).
    Sweep(Planned),
    /// Show what is in a blob (not implemented yet).
    Inspect(Planned),
    /// Run the fixed-point anomaly detector and print alarms (not implemented yet).
    Detect(Planned),
    /// Generate a Rust module embedding a blob (not implemented yet).
    Codegen(Planned),
    /// Generate the demo scenario's data sets (not implemented yet).
    Simulate(Planned),
    /// Run the quantize-and-compare path on the built-in example.
    Demo(DemoArgs),
}

/// Arguments of a subcommand that is planned but not built yet.
#[derive(clap::Args, Debug)]
struct Planned {
    /// Ignored: this subcommand is not implemented yet.
    #[arg(trailing_var_arg = true, allow_hyphen_values = true, hide = true)]
    rest: Vec<String>,
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

/// Options of `demo`.
#[derive(clap::Args, Debug)]
struct DemoArgs {
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

fn main() -> ExitCode {
    let cli = Cli::parse();
    match run(cli) {
        Ok(code) => code,
        Err(e) => {
            eprintln!("lapwing: error: {e:#}");
            ExitCode::from(2)
        }
    }
}

fn run(cli: Cli) -> anyhow::Result<ExitCode> {
    let planned = |name: &str, what: &str| -> anyhow::Result<ExitCode> {
        anyhow::bail!("`lapwing {name}` is not implemented yet ({what}); see DESIGN.md section 6")
    };
    match cli.command {
        Command::Fit(_) => planned("fit", "training arrives with the anomaly-detection work"),
        Command::Quantize(_) => planned("quantize", "the device blob arrives with the model pipeline"),
        Command::Run(_) => planned("run", "arrives with the model pipeline"),
        Command::Report(_) => planned("report", "arrives with the error-report work"),
        Command::Sweep(_) => planned("sweep", "arrives with the error-report work"),
        Command::Inspect(_) => planned("inspect", "arrives with the model pipeline"),
        Command::Detect(_) => planned("detect", "arrives with the anomaly-detection work"),
        Command::Codegen(_) => planned("codegen", "arrives with the model pipeline"),
        Command::Simulate(_) => planned("simulate", "arrives with the anomaly-detection work"),
        Command::Demo(args) => demo(&args),
    }
}

fn demo(args: &DemoArgs) -> anyhow::Result<ExitCode> {
    if args.steps == 0 {
        anyhow::bail!("--steps must be at least 1");
    }
    let opts = QuantOptions {
        cell: match args.cell {
            CellArg::C16 => CellWidth::C16,
            CellArg::C32 => CellWidth::C32,
        },
        table: match args.table {
            TableArg::Standard => TableKind::Standard,
            TableArg::Compact => TableKind::Compact,
        },
        ..Default::default()
    };
    let summary = example::summarize(&opts, example::CALIB_STEPS, args.steps)?;
    if args.json {
        println!("{}", serde_json::to_string_pretty(&summary)?);
    } else {
        print!("{}", summary.to_table());
    }
    Ok(ExitCode::SUCCESS)
}
