//! Benchmark of one step: decode throughput (every field, one thread and all
//! threads), then the whole pipeline with its decode, diagnostics and write
//! times (the whole step twice, best kept). Prints one JSON line per measurement.
//!
//!     cargo bench --bench step -- FILE.grib2 [OUT_DIR [NEXT_STEP.grib2]]
//!
//! Then the step once more with the quicklook images of the default list on:
//! the images' time against the whole step's, measured in the same run. With
//! a next step, it is processed into the same directory afterwards, which
//! times the changes in time and the PV budget against the first.
//!
//! With `LEEWARD_BENCH_PAIRED=OFF.toml` (and a next step) it measures instead
//! what the products that configuration switches off cost: `LEEWARD_BENCH_ROUNDS`
//! rounds (default 5), each the first and the next step without those products
//! and then with them (every default), one `pair` line per step and mode, so that
//! each round's two modes ran side by side on a shared machine.

use std::time::Instant;

use leeward::config::Config;
use leeward::ingest::catalogue::catalogue;
use leeward::ingest::decode::decode_raw;
use leeward::pipeline::{grid_suffixes, plan, read_input};
use leeward::products::{run_step, Destination};
use rayon::prelude::*;

fn main() {
    let args: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| a != "--bench")
        .collect();
    let Some(path) = args.first() else {
        eprintln!("usage: cargo bench --bench step -- FILE.grib2 [OUT_DIR]");
        std::process::exit(2);
    };
    let out = args
        .get(1)
        .cloned()
        .unwrap_or_else(|| "target/bench/out".into());
    let bytes = std::fs::read(path).expect("read the benchmark file");
    let t = Instant::now();
    let cat = catalogue(&bytes);
    let cat_s = t.elapsed().as_secs_f64();
    let points: usize = cat.fields.iter().map(|f| f.num_points).sum();
    println!(
        "{{\"what\":\"catalogue\",\"fields\":{},\"seconds\":{cat_s:.4}}}",
        cat.fields.len()
    );
    for threads in [1, rayon::current_num_threads()] {
        let pool = rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .expect("pool");
        let mut best = f64::INFINITY;
        for _ in 0..3 {
            let t = Instant::now();
            let n: usize = pool.install(|| {
                cat.fields
                    .par_iter()
                    .map(|f| decode_raw(&bytes, f).map(|v| v.len()).unwrap_or(0))
                    .sum()
            });
            assert_eq!(n, points);
            best = best.min(t.elapsed().as_secs_f64());
        }
        println!(
            "{{\"what\":\"decode\",\"threads\":{threads},\"points\":{points},\"seconds\":{best:.4},\"mpoints_per_s\":{:.2}}}",
            points as f64 / best / 1e6
        );
    }
    let out = std::path::PathBuf::from(out);
    if let (Ok(off), Some(next)) = (std::env::var("LEEWARD_BENCH_PAIRED"), args.get(2)) {
        let off = Config::load(std::path::Path::new(&off)).expect("the configuration without");
        let rounds = std::env::var("LEEWARD_BENCH_ROUNDS")
            .ok()
            .and_then(|r| r.parse().ok())
            .unwrap_or(5);
        paired(path, next, &out, &off, rounds);
        return;
    }
    // LEEWARD_BENCH_CONFIG names a configuration file (for instance one with some
    // products switched off, to measure what they cost); default: every default.
    let cfg = match std::env::var("LEEWARD_BENCH_CONFIG") {
        Ok(p) => Config::load(std::path::Path::new(&p)).expect("the benchmark configuration"),
        Err(_) => Config::default(),
    };
    // The whole step twice, each into an empty directory (so no earlier file
    // is found for changes in time), best kept: the machine is shared.
    let mut best = f64::INFINITY;
    for round in 0..2 {
        let _ = std::fs::remove_dir_all(&out);
        std::fs::create_dir_all(&out).expect("output dir");
        let t = Instant::now();
        let (file, _) = read_input(std::path::Path::new(path));
        let files: Vec<_> = file.into_iter().collect();
        let (steps, _) = plan(&files);
        let suffixes = grid_suffixes(&steps);
        for (s, g) in steps.iter().zip(suffixes) {
            let r = run_step(s, &files, &cfg, &Destination::flat(&out), g);
            if round == 1 {
                for (name, secs) in &r.family_seconds {
                    println!("{{\"what\":\"family\",\"name\":\"{name}\",\"seconds\":{secs:.4}}}");
                }
            }
            println!(
                "{{\"what\":\"step\",\"round\":{round},\"fields_used\":{},\"decode_s\":{:.4},\"diagnostics_s\":{:.4},\"write_s\":{:.4},\"changes_s\":{:.4},\"step_s\":{:.4}}}",
                r.fields_used, r.decode_seconds, r.compute_seconds, r.write_seconds, r.changes_seconds, r.seconds
            );
        }
        best = best.min(t.elapsed().as_secs_f64());
    }
    println!("{{\"what\":\"pipeline\",\"seconds\":{best:.4},\"runs\":2}}");
    images_share(path, &out);
    if let Some(next) = args.get(2) {
        let t = Instant::now();
        let (file, _) = read_input(std::path::Path::new(next));
        let files: Vec<_> = file.into_iter().collect();
        let (steps, _) = plan(&files);
        let suffixes = grid_suffixes(&steps);
        for (s, g) in steps.iter().zip(suffixes) {
            let r = run_step(s, &files, &cfg, &Destination::flat(&out), g);
            println!(
                "{{\"what\":\"next_step\",\"changes_and_budget_s\":{:.4},\"step_s\":{:.4},\"updated\":{}}}",
                r.changes_seconds,
                r.seconds,
                r.updated.len()
            );
        }
        println!(
            "{{\"what\":\"next_pipeline\",\"seconds\":{:.4}}}",
            t.elapsed().as_secs_f64()
        );
    }
}

/// The whole step with the default quicklook images drawn, into an empty
/// directory: the images' seconds and their share of the step's.
fn images_share(path: &str, out: &std::path::Path) {
    let mut cfg = Config::default();
    cfg.quicklook.enabled = true;
    let _ = std::fs::remove_dir_all(out);
    std::fs::create_dir_all(out).expect("output dir");
    let (file, _) = read_input(std::path::Path::new(path));
    let files: Vec<_> = file.into_iter().collect();
    let (steps, _) = plan(&files);
    let suffixes = grid_suffixes(&steps);
    for (s, g) in steps.iter().zip(suffixes) {
        let r = run_step(s, &files, &cfg, &Destination::flat(out), g);
        let bytes: u64 = r
            .images
            .iter()
            .filter_map(|p| std::fs::metadata(p).ok())
            .map(|m| m.len())
            .sum();
        println!(
            "{{\"what\":\"step_with_images\",\"images\":{},\"png_bytes\":{bytes},\"images_s\":{:.4},\"step_s\":{:.4},\"images_share\":{:.4}}}",
            r.images.len(),
            r.images_seconds,
            r.seconds,
            r.images_seconds / r.seconds
        );
    }
}

/// Every step of `path`'s file with `cfg` into `out`: (seconds of the whole
/// steps, each step's families' seconds).
/// Processor seconds (user and system, every thread) this process has used.
fn cpu_seconds() -> f64 {
    // SAFETY: getrusage writes one `rusage` into the zeroed struct we own, which
    // lives across the call; RUSAGE_SELF needs nothing else.
    let mut u: libc::rusage = unsafe { std::mem::zeroed() };
    if unsafe { libc::getrusage(libc::RUSAGE_SELF, &mut u) } != 0 {
        return f64::NAN;
    }
    let s = |t: libc::timeval| t.tv_sec as f64 + t.tv_usec as f64 * 1e-6;
    s(u.ru_utime) + s(u.ru_stime)
}

/// Wall seconds, processor seconds and the family timings of the steps in `path`.
fn steps_of(
    path: &str,
    cfg: &Config,
    out: &std::path::Path,
) -> (f64, f64, Vec<(&'static str, f64)>) {
    let (t, cpu) = (Instant::now(), cpu_seconds());
    let (file, _) = read_input(std::path::Path::new(path));
    let files: Vec<_> = file.into_iter().collect();
    let (steps, _) = plan(&files);
    let suffixes = grid_suffixes(&steps);
    let mut families = Vec::new();
    for (s, g) in steps.iter().zip(suffixes) {
        let r = run_step(s, &files, cfg, &Destination::flat(out), g);
        families.extend(r.family_seconds);
        families.push(("after_writing", r.changes_seconds));
    }
    (t.elapsed().as_secs_f64(), cpu_seconds() - cpu, families)
}

/// `rounds` rounds of the first step into an empty directory and the next step
/// after it, without the products `off` switches off and with every default: in
/// even rounds without them first, in odd rounds with them first, so that what
/// running second does to a step falls on both.
fn paired(first: &str, next: &str, out: &std::path::Path, off: &Config, rounds: usize) {
    let on = Config::default();
    for round in 0..rounds {
        let mut modes = [("off", off), ("on", &on)];
        if round % 2 == 1 {
            modes.reverse();
        }
        for (mode, cfg) in modes {
            let _ = std::fs::remove_dir_all(out);
            std::fs::create_dir_all(out).expect("output dir");
            for (step, path) in [("first", first), ("next", next)] {
                let (seconds, cpu, families) = steps_of(path, cfg, out);
                let fam: Vec<String> = families
                    .iter()
                    .map(|(n, s)| format!("\"{n}\":{s:.4}"))
                    .collect();
                println!(
                    "{{\"what\":\"pair\",\"round\":{round},\"mode\":\"{mode}\",\"step\":\"{step}\",\"seconds\":{seconds:.4},\"cpu_seconds\":{cpu:.4},\"families\":{{{}}}}}",
                    fam.join(",")
                );
            }
        }
    }
}
