//! The command line: arguments, logging set-up, and exit codes.
//!
//! In: the process arguments. Out: the command's work and an exit code
//! (see [`exit`]). Errors become one clear message on standard error.

use std::io::IsTerminal;
use std::path::PathBuf;
use std::process::ExitCode;
use std::time::Instant;

use clap::{Parser, Subcommand};
use indicatif::{ProgressBar, ProgressStyle};
use tracing_subscriber::EnvFilter;

use crate::config::Config;
use crate::pipeline::{grid_suffixes, plan, read_input, run_step, Issue, StepReport};

/// Exit codes of every command.
pub mod exit {
    /// Everything asked for was done.
    pub const OK: u8 = 0;
    /// Usage error (bad arguments, invalid config).
    pub const USAGE: u8 = 2;
    /// Some input was unusable, but other products were written.
    pub const PARTIAL: u8 = 3;
    /// Nothing could be done.
    pub const NOTHING: u8 = 4;
}

const EXIT_HELP: &str = "Exit codes: 0 all done; 2 usage or configuration error; \
3 some input was unusable but other products were written; 4 nothing could be done.";

/// leeward: dynamical diagnostics from GRIB2 model output, as CF NetCDF.
///
/// Guidance for trained forecasters, not warnings: local procedures and the
/// responsible national meteorological service take precedence.
#[derive(Parser, Debug)]
#[command(name = "leeward", version, about, after_help = EXIT_HELP)]
pub struct Cli {
    /// Log format: `text` (default, journald-friendly) or `json`.
    #[arg(long, global = true, default_value = "text", value_parser = ["text", "json"])]
    pub log_format: String,
    /// The command.
    #[command(subcommand)]
    pub command: Command,
}

/// Commands.
#[derive(Subcommand, Debug)]
pub enum Command {
    /// Process GRIB2 files once: one NetCDF file per cycle step into --out.
    #[command(after_help = EXIT_HELP)]
    Process {
        /// Configuration file (TOML); defaults are used without one.
        #[arg(long)]
        config: Option<PathBuf>,
        /// Output directory (created if missing).
        #[arg(long)]
        out: PathBuf,
        /// GRIB2 files, any number, in any order.
        #[arg(required = true)]
        inputs: Vec<PathBuf>,
    },
    /// Write the invented demo scenario as GRIB2 and process it: shows leeward at work.
    Demo {
        /// Directory for the demo's input and products (default: a new one under the system temporary directory).
        #[arg(long)]
        dir: Option<PathBuf>,
    },
}

fn init_logging(format: &str) {
    let filter = EnvFilter::try_from_env("LEEWARD_LOG").unwrap_or_else(|_| EnvFilter::new("warn"));
    let b = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    if format == "json" {
        b.json().init();
    } else {
        b.with_ansi(std::io::stderr().is_terminal()).init();
    }
}

/// Entry point of the binary.
pub fn main() -> ExitCode {
    let cli = match Cli::try_parse() {
        Ok(c) => c,
        Err(e) => {
            let _ = e.print();
            return ExitCode::from(if e.use_stderr() {
                exit::USAGE
            } else {
                exit::OK
            });
        }
    };
    init_logging(&cli.log_format);
    match cli.command {
        Command::Process {
            config,
            out,
            inputs,
        } => ExitCode::from(process(config, out, inputs)),
        Command::Demo { dir } => ExitCode::from(demo(dir)),
    }
}

fn print_issue(i: &Issue) {
    eprintln!("leeward: {i}");
}

fn summary(r: &StepReport) {
    let mut line = format!("step {} +{:03}h", r.cycle, r.lead_hours);
    if !r.grid.is_empty() {
        line.push_str(&format!(" [{}]", r.grid));
    }
    match (&r.output, &r.skipped) {
        (Some(p), _) => line.push_str(&format!(
            ": {} fields used, products {} -> {} ({:.2} s: decode {:.2}, diagnostics {:.2}, write {:.2})",
            r.fields_used,
            r.products.join(" "),
            p.display(),
            r.seconds,
            r.decode_seconds,
            r.compute_seconds,
            r.write_seconds
        )),
        (None, Some(why)) => line.push_str(&format!(": nothing written: {why}")),
        (None, None) => line.push_str(": nothing written"),
    }
    println!("{line}");
    if !r.missing.is_empty() {
        println!("    missing: {}", r.missing.join("; "));
    }
}

/// `leeward process`: returns the exit code.
pub fn process(config: Option<PathBuf>, out: PathBuf, inputs: Vec<PathBuf>) -> u8 {
    let t0 = Instant::now();
    let cfg = match config {
        Some(p) => match Config::load(&p) {
            Ok(c) => c,
            Err(e) => {
                eprintln!("leeward: {e}");
                return exit::USAGE;
            }
        },
        None => Config::default(),
    };
    if let Err(e) = std::fs::create_dir_all(&out) {
        eprintln!(
            "leeward: cannot create output directory {}: {e}",
            out.display()
        );
        return exit::NOTHING;
    }
    let bar = if inputs.len() > 1 && std::io::stderr().is_terminal() {
        let b = ProgressBar::new(inputs.len() as u64);
        if let Ok(style) = ProgressStyle::with_template("{msg:12} [{bar:30}] {pos}/{len} {elapsed}")
        {
            b.set_style(style.progress_chars("=> "));
        }
        b.set_message("cataloguing");
        Some(b)
    } else {
        None
    };
    let mut files = Vec::new();
    let mut issues = Vec::new();
    for p in &inputs {
        let (f, mut i) = read_input(p);
        files.extend(f);
        issues.append(&mut i);
        if let Some(b) = &bar {
            b.inc(1);
        }
    }
    let (steps, mut plan_issues) = plan(&files);
    issues.append(&mut plan_issues);
    let suffixes = grid_suffixes(&steps);
    if let Some(b) = &bar {
        b.set_position(0);
        b.set_length(steps.len() as u64);
        b.set_message("steps");
    }
    let mut written = 0usize;
    let mut reports = Vec::new();
    for (step, suffix) in steps.iter().zip(suffixes) {
        let r = run_step(step, &files, &cfg, &out, suffix);
        if r.output.is_some() {
            written += 1;
        }
        if let Some(b) = &bar {
            b.inc(1);
        }
        reports.push(r);
    }
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    for r in &reports {
        summary(r);
        issues.extend(r.issues.iter().cloned());
    }
    for i in &issues {
        print_issue(i);
    }
    let failed_writes = reports
        .iter()
        .filter(|r| {
            r.output.is_none()
                && r.skipped
                    .as_deref()
                    .is_some_and(|s| s.starts_with("netCDF") || s.starts_with("cannot write"))
        })
        .count();
    println!(
        "{} step file(s) written to {} in {:.2} s; {} input problem(s)",
        written,
        out.display(),
        t0.elapsed().as_secs_f64(),
        issues.len() + failed_writes
    );
    if written == 0 {
        eprintln!("leeward: nothing could be made from the input");
        exit::NOTHING
    } else if !issues.is_empty() || failed_writes > 0 {
        exit::PARTIAL
    } else {
        exit::OK
    }
}

/// `leeward demo`: returns the exit code.
pub fn demo(dir: Option<PathBuf>) -> u8 {
    let dir = dir.unwrap_or_else(|| {
        std::env::temp_dir().join(format!(
            "leeward-demo-{}",
            chrono::Utc::now().format("%Y%m%dT%H%M%S")
        ))
    });
    let incoming = dir.join("incoming");
    let products = dir.join("products");
    println!(
        "leeward demo: writing the invented scenario as GRIB2 into {}",
        incoming.display()
    );
    let inputs = match crate::demo::write_inputs(&incoming, &[0, 6, 12, 18, 24]) {
        Ok(v) => v,
        Err(e) => {
            eprintln!(
                "leeward: cannot write the demo input in {}: {e}",
                incoming.display()
            );
            return exit::NOTHING;
        }
    };
    let code = process(None, products.clone(), inputs);
    println!("leeward demo: products are in {}", products.display());
    println!(
        "    open them with any CF-aware reader, e.g. ncdump -h {}/*.nc (ncdump is in Debian's netcdf-bin)",
        products.display()
    );
    code
}
