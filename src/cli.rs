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
use crate::escape::shown;
use crate::outcome::StepOutcome;
use crate::pipeline::{grid_suffixes, index_input, load_step_input, plan, Issue, StepReport};
use crate::products::{run_step, Destination};

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
        #[arg(long, required_unless_present_any = ["job", "tracks"])]
        out: Option<PathBuf>,
        /// GRIB2 files, any number, in any order.
        #[arg(required_unless_present_any = ["job", "tracks"])]
        inputs: Vec<PathBuf>,
        /// Run one step as a batch job of `leeward serve`: the staging
        /// directory the service prepared (its spec says inputs, step and
        /// configuration; products and a result record are left there for
        /// the service to publish).
        #[arg(long, value_name = "DIR", conflicts_with_all = ["config", "out", "inputs"])]
        job: Option<PathBuf>,
        /// Make the cycle's cyclone tracks for the step whose result `leeward
        /// serve` is taking in this staging directory (the service runs this).
        #[arg(long, value_name = "DIR", hide = true, conflicts_with_all = ["config", "out", "inputs", "job"])]
        tracks: Option<PathBuf>,
    },
    /// Play the invented demo cycle through the real service: its GRIB2 files are delivered
    /// one step at a time into a directory `leeward serve` watches, and a table says per step
    /// what arrived, what was published and how long it took.
    Demo {
        /// Directory for the demo's input and products (default: a new one under the system temporary directory).
        #[arg(long)]
        dir: Option<PathBuf>,
        /// Only write the GRIB2 input (into DIR/incoming), do not process it.
        #[arg(long)]
        inputs_only: bool,
        /// Cycle of the invented scenario, e.g. 2026031400.
        #[arg(long, default_value = "2026031400")]
        cycle: String,
        /// Lead times, hours, comma-separated.
        #[arg(
            long,
            value_delimiter = ',',
            default_value = "0,6,12,18,24,30,36,42,48"
        )]
        leads: Vec<u32>,
        /// Seconds between a step's publication and the next step's delivery.
        #[arg(long, default_value_t = 1.0)]
        pause: f64,
    },
    /// Run as a service: watch the feeds' incoming directories and publish each step as it completes.
    ///
    /// Stops on SIGTERM or SIGINT (steps in hand are finished within
    /// service.shutdown_grace_s), reloads the configuration on SIGHUP.
    /// Exit codes: 0 stopped on request; 2 configuration or state directory unusable.
    Serve {
        // The help text names the TOML tables as they are written, brackets and
        // all, which a doc comment would take for links.
        #[arg(
            long,
            help = "Configuration file (TOML) with [service] and [[feed]] tables."
        )]
        config: PathBuf,
        /// Base of the incoming directories (overrides service.watch_dir).
        #[arg(long)]
        watch_dir: Option<PathBuf>,
        /// Root of the output tree (overrides service.out_dir).
        #[arg(long)]
        out_dir: Option<PathBuf>,
        /// State directory: ledger, requests, quarantine (overrides service.state_dir).
        #[arg(long)]
        state_dir: Option<PathBuf>,
    },
    /// Show the recent cycles of each feed and where their steps stand, from the ledger.
    Status {
        /// The service's state directory.
        #[arg(long)]
        state_dir: PathBuf,
        /// Cycles to show per feed, newest first.
        #[arg(long, default_value_t = 4)]
        cycles: usize,
        /// Print JSON instead of text.
        #[arg(long)]
        json: bool,
        /// Check every shown product against its manifest's SHA-256 too (reads each
        /// file whole), not only its size.
        #[arg(long)]
        verify: bool,
    },
    /// List what is in GRIB2 files: per field the quantity, level, times, grid, packing and value range.
    Inspect {
        /// GRIB2 files.
        #[arg(required = true)]
        files: Vec<PathBuf>,
        /// Print JSON (one object per file, in an array) instead of text.
        #[arg(long)]
        json: bool,
        /// Do not decode the values (faster; no ranges).
        #[arg(long)]
        no_values: bool,
    },
    /// Check a configuration file: every problem at once, each naming its key; then the
    /// configuration as it will be used, with every default filled in.
    ///
    /// Exit codes: 0 valid; 2 invalid.
    CheckConfig {
        /// The configuration file (TOML).
        file: PathBuf,
        /// Print only the problems (or nothing if valid).
        #[arg(long)]
        quiet: bool,
    },
    /// Print a shell completion script (bash, zsh, fish, elvish, powershell).
    Completions {
        /// The shell.
        shell: clap_complete::Shell,
    },
    /// Write the manual pages (roff) of leeward and its commands into a directory.
    Man {
        /// Directory for the pages (created if missing).
        #[arg(long, default_value = ".")]
        out: PathBuf,
    },
    /// Ask the running service to make a cycle (or one step of it) again, e.g. after fixing the configuration.
    ///
    /// The request waits in the state directory until the service takes it
    /// (within a second when it runs). The cycle's input must still be in the
    /// feed's incoming directory.
    Reprocess {
        /// The service's state directory.
        #[arg(long)]
        state_dir: PathBuf,
        /// The feed's name.
        #[arg(long)]
        feed: String,
        /// The cycle: 2026031400, 20260314T0000Z or 2026-03-14T00:00Z.
        #[arg(long)]
        cycle: String,
        /// One lead time only, hours.
        #[arg(long)]
        lead: Option<i64>,
    },
}

fn init_logging(format: &str, default_level: &str) {
    let filter =
        EnvFilter::try_from_env("LEEWARD_LOG").unwrap_or_else(|_| EnvFilter::new(default_level));
    let b = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    // Under systemd the journal stamps each line itself.
    let journald = std::env::var_os("JOURNAL_STREAM").is_some();
    if format == "json" {
        b.json().init();
    } else if journald {
        b.fmt_fields(crate::escape::LogFields)
            .with_ansi(false)
            .without_time()
            .init();
    } else {
        b.fmt_fields(crate::escape::LogFields)
            .with_ansi(std::io::stderr().is_terminal())
            .init();
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
    let level = if matches!(cli.command, Command::Serve { .. }) {
        "info"
    } else {
        "warn"
    };
    init_logging(&cli.log_format, level);
    if matches!(
        cli.command,
        Command::Inspect { .. }
            | Command::Status { .. }
            | Command::CheckConfig { .. }
            | Command::Completions { .. }
            | Command::Man { .. }
    ) {
        // Commands that print a listing end quietly when the reader of their
        // output goes away (`leeward inspect FILE | head`), as Unix tools do.
        // SAFETY: signal(2) with SIG_DFL installs no handler of ours (no code
        // runs in signal context), and it is called here on the main thread
        // before the command starts any other thread.
        unsafe {
            libc::signal(libc::SIGPIPE, libc::SIG_DFL);
        }
    }
    match cli.command {
        Command::Process {
            config,
            out,
            inputs,
            job,
            tracks,
        } => match (job, tracks, out) {
            (_, Some(dir), _) => ExitCode::from(crate::service::batch::tracks_in_job(&dir)),
            (Some(dir), None, _) => ExitCode::from(crate::service::batch::run_in_job(&dir)),
            (None, None, Some(out)) => ExitCode::from(process(config, out, inputs)),
            (None, None, None) => ExitCode::from(exit::USAGE),
        },
        Command::Demo {
            dir,
            inputs_only,
            cycle,
            leads,
            pause,
        } => ExitCode::from(demo(dir, inputs_only, &cycle, &leads, pause)),
        Command::Serve {
            config,
            watch_dir,
            out_dir,
            state_dir,
        } => ExitCode::from(crate::service::daemon::serve(
            crate::service::daemon::ServeOptions {
                config,
                watch_dir,
                out_dir,
                state_dir,
                log_format: cli.log_format.clone(),
            },
        )),
        Command::Status {
            state_dir,
            cycles,
            json,
            verify,
        } => ExitCode::from(status(&state_dir, cycles, json, verify)),
        Command::Reprocess {
            state_dir,
            feed,
            cycle,
            lead,
        } => ExitCode::from(reprocess(&state_dir, feed, &cycle, lead)),
        Command::Inspect {
            files,
            json,
            no_values,
        } => ExitCode::from(inspect(&files, json, !no_values)),
        Command::CheckConfig { file, quiet } => ExitCode::from(check_config(&file, quiet)),
        Command::Completions { shell } => {
            use clap::CommandFactory;
            // Into memory first: a closed pipe (`| head`) is not an error worth a panic.
            let mut buf = Vec::new();
            clap_complete::generate(shell, &mut Cli::command(), "leeward", &mut buf);
            let _ = std::io::Write::write_all(&mut std::io::stdout(), &buf);
            ExitCode::from(exit::OK)
        }
        Command::Man { out } => ExitCode::from(man(&out)),
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
    match &r.outcome {
        StepOutcome::Made(p) => line.push_str(&format!(
            ": {} fields used, products {} -> {} ({:.2} s: decode {:.2}, diagnostics {:.2}, write {:.2}, changes and tracks {:.2}, images {:.2})",
            r.fields_used,
            r.products.join(" "),
            p.display(),
            r.seconds,
            r.decode_seconds,
            r.compute_seconds,
            r.write_seconds,
            r.changes_seconds,
            r.images_seconds
        )),
        other => line.push_str(&format!(
            ": nothing written: {}",
            other.reason().unwrap_or_default()
        )),
    }
    println!("{line}");
    if !r.missing.is_empty() {
        println!("    missing: {}", r.missing.join("; "));
    }
    if !r.left_out.is_empty() {
        println!("    left out: {}", r.left_out.join("; "));
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
        let (f, mut i) = index_input(p);
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
    let mut pages = Vec::new();
    let mut reports = Vec::new();
    for (step, suffix) in steps.iter().zip(suffixes) {
        // Only this step's messages are in memory, and only while it runs.
        let r = match load_step_input(step, &files) {
            Ok((s, loaded)) => run_step(&s, &loaded, &cfg, &Destination::flat(&out), suffix),
            Err(issue) => StepReport {
                cycle: step
                    .key
                    .reference_time
                    .format("%Y-%m-%dT%H:%MZ")
                    .to_string(),
                lead_hours: step.lead_hours(),
                outcome: StepOutcome::InputFailed {
                    reason: issue.reason.clone(),
                },
                issues: vec![issue],
                ..StepReport::default()
            },
        };
        if r.outcome.made().is_some() {
            written += 1;
            // With quicklooks on, a page per cycle beside the products shows
            // them, written again after each step.
            if cfg.quicklook.enabled {
                match crate::output::page::refresh(&out) {
                    Ok(p) => pages = p,
                    Err(e) => eprintln!("cycle page not written in {}: {e}", out.display()),
                }
            }
        }
        if let Some(b) = &bar {
            b.inc(1);
        }
        reports.push(r);
    }
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    for p in &pages {
        println!("cycle page {}", p.display());
    }
    for r in &reports {
        summary(r);
        issues.extend(r.issues.iter().cloned());
    }
    for i in &issues {
        print_issue(i);
    }
    for r in reports.iter().filter(|r| r.outcome.output_failed()) {
        eprintln!(
            "leeward: step {} +{:03}h not written: {}",
            r.cycle,
            r.lead_hours,
            crate::escape::text(r.outcome.reason().unwrap_or_default())
        );
    }
    let failed_writes = reports.iter().filter(|r| r.outcome.output_failed()).count();
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

/// `leeward inspect`: returns the exit code.
pub fn inspect(files: &[PathBuf], json: bool, with_values: bool) -> u8 {
    let mut listings = Vec::new();
    let mut failed = 0;
    for f in files {
        match crate::ingest::source::open_input(f, true) {
            Ok(o) => listings.push(crate::ingest::inspect::inspect_file(
                &crate::escape::path(f),
                &o.file,
                o.size,
                with_values,
            )),
            Err(e) => {
                eprintln!("leeward: {}: {e}", shown(f));
                failed += 1;
            }
        }
    }
    if json {
        match serde_json::to_string_pretty(&listings) {
            Ok(t) => println!("{t}"),
            Err(e) => {
                eprintln!("leeward: {e}");
                return exit::NOTHING;
            }
        }
    } else {
        for l in &listings {
            print!("{}", crate::ingest::inspect::render(l));
        }
    }
    // What made the exit code non-zero, on standard error too: one line each.
    let mut unusable = false;
    for l in &listings {
        for p in &l.problems {
            eprintln!("leeward: {}: {p}", l.file);
            unusable = true;
        }
        for f in &l.fields {
            if let Some(why) = f.unusable.as_ref().or(f.grid_problem.as_ref()) {
                let q = f
                    .quantity
                    .clone()
                    .unwrap_or_else(|| format!("parameter {}/{}/{}", f.wmo[0], f.wmo[1], f.wmo[2]));
                eprintln!(
                    "leeward: {}: field {} ({q} at {}): {why}",
                    l.file, f.index, f.level
                );
                unusable = true;
            }
        }
    }
    if listings.is_empty() {
        exit::NOTHING
    } else if failed > 0 || unusable {
        exit::PARTIAL
    } else {
        exit::OK
    }
}

/// `leeward check-config`: returns the exit code.
pub fn check_config(file: &std::path::Path, quiet: bool) -> u8 {
    let text = match std::fs::read_to_string(file) {
        Ok(t) => t,
        Err(e) => {
            eprintln!("leeward: cannot read config {}: {e}", file.display());
            return exit::USAGE;
        }
    };
    match crate::config::check(&text, &file.display().to_string()) {
        Ok(cfg) => {
            if !quiet {
                println!(
                    "# {}: valid; the configuration as leeward uses it, every default filled in",
                    file.display()
                );
                match toml::to_string_pretty(&cfg) {
                    Ok(t) => print!("{t}"),
                    Err(e) => eprintln!("leeward: {e}"),
                }
            }
            exit::OK
        }
        Err(problems) => {
            eprintln!("leeward: {}: {} problem(s)", file.display(), problems.len());
            for p in &problems {
                eprintln!("  {p}");
            }
            exit::USAGE
        }
    }
}

/// `leeward man`: returns the exit code.
pub fn man(out: &std::path::Path) -> u8 {
    use clap::CommandFactory;
    let cmd = Cli::command();
    let write = |name: &str, c: clap::Command| -> std::io::Result<()> {
        let mut buf = Vec::new();
        clap_mangen::Man::new(c).render(&mut buf)?;
        std::fs::write(out.join(format!("{name}.1")), buf)
    };
    let r = std::fs::create_dir_all(out).and_then(|()| {
        write("leeward", cmd.clone())?;
        for sub in cmd.get_subcommands() {
            // clap names commands with 'static strings; this runs once and exits.
            let name: &'static str =
                Box::leak(format!("leeward-{}", sub.get_name()).into_boxed_str());
            write(name, sub.clone().name(name))?;
        }
        Ok(())
    });
    match r {
        Ok(()) => {
            println!("manual pages written to {}", out.display());
            exit::OK
        }
        Err(e) => {
            eprintln!(
                "leeward: cannot write manual pages in {}: {e}",
                out.display()
            );
            exit::NOTHING
        }
    }
}

/// `leeward status`: returns the exit code.
pub fn status(state_dir: &std::path::Path, cycles: usize, json: bool, verify: bool) -> u8 {
    match crate::service::status::report(state_dir, cycles, verify) {
        Ok(r) => {
            if json {
                match serde_json::to_string_pretty(&r) {
                    Ok(t) => println!("{t}"),
                    Err(e) => {
                        eprintln!("leeward: {e}");
                        return exit::NOTHING;
                    }
                }
            } else {
                print!("{}", crate::service::status::render(state_dir, &r));
            }
            exit::OK
        }
        Err(e) => {
            eprintln!("leeward: no ledger to read: {e}");
            exit::NOTHING
        }
    }
}

/// `leeward reprocess`: returns the exit code.
pub fn reprocess(state_dir: &std::path::Path, feed: String, cycle: &str, lead: Option<i64>) -> u8 {
    use crate::service::daemon::{parse_cycle, request_reprocess, ReprocessRequest};
    let Some(t) = parse_cycle(cycle) else {
        eprintln!(
            "leeward: --cycle {cycle:?} is not a cycle such as 2026031400 or 2026-03-14T00:00Z"
        );
        return exit::USAGE;
    };
    let req = ReprocessRequest {
        feed,
        cycle: crate::output::store::cycle_dir_name(t),
        lead,
    };
    match request_reprocess(state_dir, &req) {
        Ok(p) => {
            let running = crate::service::status::service_running(state_dir).is_some();
            println!(
                "reprocess of {} {}{} requested ({}){}",
                req.feed,
                req.cycle,
                lead.map(|l| format!(" +{l}h")).unwrap_or_default(),
                p.display(),
                if running {
                    ""
                } else {
                    "; no service holds this state directory now: it is taken at the next start"
                }
            );
            exit::OK
        }
        Err(e) => {
            eprintln!(
                "leeward: cannot write the request in {}: {e}",
                state_dir.display()
            );
            exit::NOTHING
        }
    }
}

/// `leeward demo`: returns the exit code.
pub fn demo(dir: Option<PathBuf>, inputs_only: bool, cycle: &str, leads: &[u32], pause: f64) -> u8 {
    let Some(reference) = crate::service::daemon::parse_cycle(cycle) else {
        eprintln!("leeward: --cycle {cycle:?} is not a cycle such as 2026031400");
        return exit::USAGE;
    };
    if !(0.0..=60.0).contains(&pause) {
        eprintln!("leeward: --pause {pause} is outside 0 to 60 s");
        return exit::USAGE;
    }
    let dir = dir.unwrap_or_else(|| {
        std::env::temp_dir().join(format!(
            "leeward-demo-{}",
            chrono::Utc::now().format("%Y%m%dT%H%M%S")
        ))
    });
    if inputs_only {
        let incoming = dir.join("incoming");
        let global = dir.join("incoming-global");
        return match crate::demo::write_inputs(&incoming, reference, leads).and_then(|r| {
            crate::demo::write_global_inputs(&global, reference, leads).map(|g| (r, g))
        }) {
            Ok((r, g)) => {
                println!(
                    "leeward demo: {} regional input file(s) written to {}, {} global to {}",
                    r.len(),
                    incoming.display(),
                    g.len(),
                    global.display()
                );
                exit::OK
            }
            Err(e) => {
                eprintln!(
                    "leeward: cannot write the demo input in {}: {e}",
                    incoming.display()
                );
                exit::NOTHING
            }
        };
    }
    if let Err(e) = std::fs::create_dir_all(&dir) {
        eprintln!("leeward: cannot create {}: {e}", dir.display());
        return exit::NOTHING;
    }
    let dir = dir.canonicalize().unwrap_or(dir);
    println!(
        "leeward demo: an invented cycle ({} steps) played through `leeward serve` in {}",
        leads.len(),
        dir.display()
    );
    println!(
        "  The data are invented; the products are guidance for trained forecasters, not warnings."
    );
    let play = crate::demo::play::Play {
        dir: dir.clone(),
        reference,
        leads: leads.to_vec(),
        pause: std::time::Duration::from_secs_f64(pause),
    };
    let me = std::env::current_exe()
        .map(|p| p.display().to_string())
        .unwrap_or_else(|_| "leeward".into());
    let t0 = Instant::now();
    match crate::demo::play::run(&play) {
        Ok(rows) => {
            println!();
            print!("{}", crate::demo::play::render(&rows, &dir));
            print!("{}", crate::demo::play::render_tracks(&dir));
            let published = rows.iter().filter(|r| r.published.is_some()).count();
            println!(
                "\n{published} of {} step(s) published in {:.1} s.",
                rows.len(),
                t0.elapsed().as_secs_f64()
            );
            println!("Where to look:");
            println!(
                "  products and manifests  {}/products/<feed>/<cycle>/",
                dir.display()
            );
            println!("  quicklook images        the .png files beside each product");
            println!(
                "  cyclone tracks          the *_cyclones.nc and *_cyclones.geojson files of each cycle"
            );
            println!(
                "  the service's state     {me} status --state-dir {}/state",
                dir.display()
            );
            println!("  the service's log       {}/service.log", dir.display());
            println!(
                "  the input it was fed    {me} inspect {}/incoming/regional/*.grib2",
                dir.display()
            );
            println!(
                "  its configuration       {me} check-config {}/leeward.toml",
                dir.display()
            );
            if published == rows.len() {
                exit::OK
            } else {
                exit::PARTIAL
            }
        }
        Err(e) => {
            eprintln!("leeward demo: {e}");
            exit::NOTHING
        }
    }
}
