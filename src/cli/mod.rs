//! The command-line front end: argument parsing, output (table or `--json`), exit codes.
//!
//! Each subcommand lives in its own file and returns a [`Outcome`]; this module prints it and
//! maps errors to exit codes (0 success, 1 a failed check, 2 bad input or usage).
use crate::error::{Error, Result};
use clap::{Args, Parser, Subcommand};
use std::io::IsTerminal;
use std::path::PathBuf;

pub mod calibrate;
pub mod check;
pub mod decode;
pub mod invert;
pub mod matrix;
pub mod modes;
pub mod report;
pub mod run;
pub mod synth;
pub mod watch;

/// modegram: off-axis holograms of a multimode device -> fields -> mode coefficients ->
/// transfer matrix.
#[derive(Debug, Parser)]
#[command(name = "modegram", version, about, long_about = None)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

/// Options every command takes.
#[derive(Debug, Clone, Args)]
pub struct Common {
    /// Folder for the results (created if needed).
    #[arg(long, default_value = "modegram-out")]
    pub out: PathBuf,
    /// Print a machine-readable JSON summary on stdout instead of the table.
    #[arg(long)]
    pub json: bool,
    /// Overwrite existing results in the output folder.
    #[arg(long)]
    pub force: bool,
    /// No progress bars or warnings on stderr.
    #[arg(short, long)]
    pub quiet: bool,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Solve and list the mode basis; write the basis and a picture gallery.
    Modes(modes::ModesArgs),
    /// Frames -> complex fields -> mode coefficients.
    Decode(decode::DecodeArgs),
    /// The launch sequence named in the setup -> transfer matrix and figures of merit.
    Matrix(matrix::MatrixArgs),
    /// Fit the alignment of each channel; write a fitted setup.
    Calibrate(calibrate::CalibrateArgs),
    /// Validate the holography setup: pass / warn / fail per item.
    Check(check::CheckArgs),
    /// The input needed for a target output.
    Invert(invert::InvertArgs),
    /// Simulate a launch sequence with ground truth.
    Synth(synth::SynthArgs),
    /// The whole job: calibrate, decode, assemble, analyse, report.
    Run(run::RunArgs),
    /// Decode frames as they arrive in a folder; live alignment figures.
    Watch(watch::WatchArgs),
    /// Write the self-contained report.html of a finished run's folder.
    Report(report::ReportArgs),
}

/// What a command hands back to be printed.
#[derive(Debug, Default)]
pub struct Outcome {
    /// Human table for stdout.
    pub table: String,
    /// Machine summary for `--json`.
    pub json: serde_json::Value,
    /// A check failed: exit status 1 after printing.
    pub failed: bool,
}

/// Parse the command line, run, print, and return the exit status.
pub fn main() -> i32 {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let code = if e.use_stderr() { 2 } else { 0 };
            let _ = e.print();
            return code;
        }
    };
    let (common, result) = dispatch(&cli.command);
    match result {
        Ok(outcome) => {
            if common.json {
                println!(
                    "{}",
                    serde_json::to_string_pretty(&outcome.json).unwrap_or_default()
                );
            } else if !outcome.table.is_empty() {
                print!("{}", outcome.table);
                if !outcome.table.ends_with('\n') {
                    println!();
                }
            }
            if outcome.failed {
                1
            } else {
                0
            }
        }
        Err(e) => {
            eprintln!("modegram: error: {e}");
            e.exit_code()
        }
    }
}

fn dispatch(c: &Command) -> (&Common, Result<Outcome>) {
    match c {
        Command::Modes(a) => (&a.common, modes::run(a)),
        Command::Decode(a) => (&a.common, decode::run(a)),
        Command::Matrix(a) => (&a.common, matrix::run(a)),
        Command::Calibrate(a) => (&a.common, calibrate::run(a)),
        Command::Check(a) => (&a.common, check::run(a)),
        Command::Invert(a) => (&a.common, invert::run(a)),
        Command::Synth(a) => (&a.common, synth::run(a)),
        Command::Run(a) => (&a.common, run::run(a)),
        Command::Watch(a) => (&a.common, watch::run(a)),
        Command::Report(a) => (&a.common, report::run(a)),
    }
}

/// A progress bar on stderr, hidden when quiet or when stderr is not a terminal.
pub fn progress(len: u64, what: &str, quiet: bool) -> indicatif::ProgressBar {
    if quiet || !std::io::stderr().is_terminal() {
        return indicatif::ProgressBar::hidden();
    }
    let pb = indicatif::ProgressBar::new(len);
    pb.set_style(
        indicatif::ProgressStyle::with_template(
            "{msg:>10} [{bar:40}] {pos}/{len} ({per_sec}, {eta} left)",
        )
        .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar())
        .progress_chars("=> "),
    );
    pb.set_message(what.to_string());
    pb
}

/// A warning on stderr unless quiet.
pub fn warn(quiet: bool, msg: &str) {
    if !quiet {
        eprintln!("modegram: warning: {msg}");
    }
}

/// Format rows as an aligned text table with a header line.
pub fn table(header: &[&str], rows: &[Vec<String>]) -> String {
    let n = header.len();
    let mut width: Vec<usize> = header.iter().map(|h| h.len()).collect();
    for r in rows {
        for (i, c) in r.iter().enumerate().take(n) {
            width[i] = width[i].max(c.chars().count());
        }
    }
    let mut s = String::new();
    let line = |cells: Vec<&str>, s: &mut String| {
        let parts: Vec<String> = cells
            .iter()
            .enumerate()
            .map(|(i, c)| format!("{:>w$}", c, w = width[i]))
            .collect();
        s.push_str(parts.join("  ").trim_end());
        s.push('\n');
    };
    line(header.to_vec(), &mut s);
    for r in rows {
        line(r.iter().map(String::as_str).collect(), &mut s);
    }
    s
}

/// Error for a command whose stage is not in this build.
pub fn unavailable(what: &str) -> Error {
    Error::Input(format!("{what}: not available in this build"))
}
