//! The demo played through the real service: `leeward demo` writes the
//! invented cycle as GRIB2, starts `leeward serve` on a directory of its own,
//! delivers the files one step at a time as a model would (written under a
//! hidden name, renamed into place), and reports per step what arrived, what
//! was published and how long it took.
//!
//! In: a directory, a cycle, lead times, a pause between steps. Out: the
//! service's output tree, its ledger and log in that directory, and a table.

use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use chrono::{NaiveDateTime, Utc};

use crate::service::ledger::{read_state, Outcome};
use crate::service::publish::read_manifest;

/// What to play.
pub struct Play {
    /// Directory for everything (created).
    pub dir: PathBuf,
    /// Cycle.
    pub reference: NaiveDateTime,
    /// Lead times, hours.
    pub leads: Vec<u32>,
    /// Pause between steps.
    pub pause: Duration,
}

/// One published step, as the table shows it.
#[derive(Debug, Clone)]
pub struct Row {
    /// Feed.
    pub feed: String,
    /// Lead, hours.
    pub lead: i64,
    /// When its file was delivered (Unix seconds).
    pub arrived: f64,
    /// When it was published (Unix seconds).
    pub published: Option<i64>,
    /// Latency from the manifest, seconds.
    pub latency: Option<f64>,
    /// Variables in the product.
    pub variables: usize,
    /// Quicklook images beside it.
    pub images: usize,
    /// Partial, or failed with a reason.
    pub note: String,
    /// The product file.
    pub product: Option<PathBuf>,
}

/// The demo's service configuration.
pub fn config_text(dir: &Path) -> String {
    let levels: Vec<String> = super::scenario::LEVELS_HPA
        .iter()
        .map(|l| format!("{l:.1}"))
        .collect();
    format!(
        r#"# The demo's own configuration, written by `leeward demo`.
[service]
watch_dir = "{d}/incoming"
out_dir = "{d}/products"
state_dir = "{d}/state"
settle_s = 0.5
scan_interval_s = 2.0
step_timeout_s = 120.0
catch_up_hours = 0
metrics_listen = ""
workers = 2

[output.institutions]
{centre} = "{institution}"

[quicklook]
enabled = true
images = ["trop_p@2", "isen_pv@320", "eta@500", "thick@1000-500", "thick_chg_06h@1000-500", "bud_stretch@290-300", "bud_dpvdt@300"]
# The demo's world is invented: its outline is its own terrain, not a real coast.
outline = "terrain"
terrain_m = [250.0, 1000.0, 2000.0]

[[feed]]
name = "regional"
incoming = "regional"
file_pattern = '^lwdemo_(?P<cycle>\d{{10}})_(?P<step>\d{{3}})\.grib2$'
complete = "fields"
levels_hpa = [{levels}]

[[feed]]
name = "global"
incoming = "global"
file_pattern = '^lwglobal_(?P<cycle>\d{{10}})_(?P<step>\d{{3}})\.grib2$'
complete = "fields"
levels_hpa = [{levels}]
"#,
        d = dir.display(),
        levels = levels.join(", "),
        centre = super::DEMO_CENTRE,
        institution = super::DEMO_INSTITUTION
    )
}

fn unix_now() -> f64 {
    Utc::now().timestamp_millis() as f64 / 1000.0
}

fn stop(child: &mut Child) {
    let pid = rustix::process::Pid::from_child(child);
    let _ = rustix::process::kill_process(pid, rustix::process::Signal::TERM);
    let t0 = Instant::now();
    while t0.elapsed() < Duration::from_secs(60) {
        if let Ok(Some(_)) = child.try_wait() {
            return;
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    let _ = child.kill();
    let _ = child.wait();
}

fn deliver(src: &Path, dest_dir: &Path) -> std::io::Result<()> {
    std::fs::create_dir_all(dest_dir)?;
    let name = src
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dest_dir.join(format!(".{name}.tmp"));
    std::fs::copy(src, &tmp)?;
    std::fs::rename(&tmp, dest_dir.join(name))
}

fn rows(state_dir: &Path, arrived: &[(String, i64, f64)]) -> Vec<Row> {
    let state = read_state(state_dir).unwrap_or_default();
    arrived
        .iter()
        .map(|(feed, lead, at)| {
            let st = state
                .steps
                .iter()
                .find(|(t, _)| &t.feed == feed && t.lead == *lead)
                .map(|(_, s)| s.outcome.clone());
            let mut row = Row {
                feed: feed.clone(),
                lead: *lead,
                arrived: *at,
                published: None,
                latency: None,
                variables: 0,
                images: 0,
                note: String::new(),
                product: None,
            };
            match st {
                Some(Outcome::Published {
                    path,
                    manifest,
                    partial,
                    at,
                }) => {
                    row.published = Some(at);
                    if let Some(m) = read_manifest(Path::new(&manifest)) {
                        row.latency = Some(m.timings_s.latency);
                        row.variables = m.variables.len();
                        row.images = m.images.len();
                    }
                    if partial {
                        row.note = "partial".into();
                    }
                    row.product = Some(PathBuf::from(path));
                }
                Some(Outcome::Failed { reason, .. }) => row.note = format!("failed: {reason}"),
                _ => {}
            }
            row
        })
        .collect()
}

fn clock(t: f64) -> String {
    chrono::DateTime::from_timestamp(t as i64, 0)
        .map(|d| d.format("%H:%M:%S").to_string())
        .unwrap_or_default()
}

/// Print the table.
pub fn render(rows: &[Row], dir: &Path) -> String {
    let mut o = format!(
        "{:<9} {:>6}  {:<8}  {:<9}  {:>8}  {:>9}  {:>6}  {}\n",
        "feed", "step", "arrived", "published", "latency", "variables", "images", "product"
    );
    for r in rows {
        let product = r
            .product
            .as_ref()
            .map(|p| p.strip_prefix(dir).unwrap_or(p).display().to_string())
            .unwrap_or_default();
        o.push_str(&format!(
            "{:<9} {:>6}  {:<8}  {:<9}  {:>8}  {:>9}  {:>6}  {} {}\n",
            r.feed,
            format!("+{:03}h", r.lead),
            clock(r.arrived),
            r.published
                .map(|t| clock(t as f64))
                .unwrap_or_else(|| "-".into()),
            r.latency
                .map(|l| format!("{l:.1} s"))
                .unwrap_or_else(|| "-".into()),
            r.variables,
            r.images,
            product,
            r.note
        ));
    }
    o
}

/// The cyclone tracks of every feed's cycle under `dir`/products, as a table:
/// per track its steps and central pressures, then the facts at its latest point.
pub fn render_tracks(dir: &Path) -> String {
    let mut files: Vec<PathBuf> = Vec::new();
    let feeds = std::fs::read_dir(dir.join("products"))
        .into_iter()
        .flatten()
        .flatten();
    for feed in feeds {
        for cycle in std::fs::read_dir(feed.path())
            .into_iter()
            .flatten()
            .flatten()
        {
            for f in std::fs::read_dir(cycle.path())
                .into_iter()
                .flatten()
                .flatten()
            {
                let p = f.path();
                if p.to_string_lossy().ends_with("_cyclones.geojson") {
                    files.push(p);
                }
            }
        }
    }
    files.sort();
    let mut o = String::new();
    for path in files {
        let Some(g) = std::fs::read(&path)
            .ok()
            .and_then(|b| serde_json::from_slice::<serde_json::Value>(&b).ok())
        else {
            continue;
        };
        let shown = path
            .strip_prefix(dir)
            .unwrap_or(&path)
            .display()
            .to_string();
        o.push_str(&format!("\nCyclone tracks in {shown}:\n"));
        let features = g["features"].as_array().cloned().unwrap_or_default();
        let tracks: Vec<&serde_json::Value> = features
            .iter()
            .filter(|f| f["properties"]["kind"] == "track")
            .collect();
        if tracks.is_empty() {
            o.push_str("  no closed low on any step\n");
        }
        for t in tracks {
            o.push_str(&track_lines(&t["properties"]));
        }
    }
    o
}

/// One track: its points, then the facts at the latest.
fn track_lines(p: &serde_json::Value) -> String {
    let points = p["points"].as_array().cloned().unwrap_or_default();
    let steps: Vec<String> = points
        .iter()
        .map(|q| {
            format!(
                "+{}h {:.1}",
                q["lead_hours"].as_f64().unwrap_or(f64::NAN),
                q["central_pressure_hpa"].as_f64().unwrap_or(f64::NAN)
            )
        })
        .collect();
    let mut o = format!(
        "  track {} ({} points, central pressure hPa): {}\n",
        p["track"],
        points.len(),
        steps.join(", ")
    );
    if let Some(last) = points.last() {
        let where_ = format!(
            "{:.1} N {:.1} E",
            last["lat"].as_f64().unwrap_or(f64::NAN),
            last["lon"].as_f64().unwrap_or(f64::NAN)
        );
        o.push_str(&format!(
            "    at +{}h, {where_}:\n",
            last["lead_hours"].as_f64().unwrap_or(f64::NAN)
        ));
        for line in last["facts"].as_array().into_iter().flatten() {
            o.push_str(&format!("      {}\n", line.as_str().unwrap_or_default()));
        }
    }
    o
}

/// A file in every directory `leeward demo` plays into: how a later run knows
/// the directory holds an earlier demo (and nothing of the user's).
pub const MARKER: &str = ".leeward-demo";
/// What a demo run writes in its directory.
const OWN: [&str; 6] = [
    "generated",
    "incoming",
    "products",
    "state",
    "leeward.toml",
    "service.log",
];

/// Make `dir` ready for a fresh run: a new or empty directory is taken; one
/// that holds an earlier demo run (it has [`MARKER`]) has that run's files
/// removed, so the table shows this run and not the ledger of the last; any
/// other non-empty directory is refused, never touched. Returns whether an
/// earlier run was cleared.
pub fn prepare_dir(dir: &Path) -> Result<bool, String> {
    let used = match std::fs::read_dir(dir) {
        Ok(mut rd) => rd.next().is_some(),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => false,
        Err(e) => return Err(format!("cannot read {}: {e}", dir.display())),
    };
    let marker = dir.join(MARKER);
    if used && !marker.is_file() {
        return Err(format!(
            "{} is not empty and holds no earlier demo run: give a new or empty directory \
             (nothing in it was touched)",
            dir.display()
        ));
    }
    let cleared = used;
    for name in OWN {
        let path = dir.join(name);
        let r = if path.is_dir() {
            std::fs::remove_dir_all(&path)
        } else if path.exists() {
            std::fs::remove_file(&path)
        } else {
            Ok(())
        };
        r.map_err(|e| {
            format!(
                "cannot clear the earlier demo run's {}: {e}",
                path.display()
            )
        })?;
    }
    std::fs::create_dir_all(dir).map_err(|e| format!("cannot create {}: {e}", dir.display()))?;
    std::fs::write(
        &marker,
        "a directory of `leeward demo`: a later demo run here starts afresh\n",
    )
    .map_err(|e| format!("cannot write {}: {e}", marker.display()))?;
    Ok(cleared)
}

/// Play the demo. Returns the rows, or why it could not run.
pub fn run(p: &Play) -> Result<Vec<Row>, String> {
    if prepare_dir(&p.dir)? {
        eprintln!(
            "leeward demo: {} held an earlier demo run; its files were removed and the demo starts afresh",
            p.dir.display()
        );
    }
    let generated = p.dir.join("generated");
    let write_err = |e: std::io::Error| {
        format!(
            "cannot write the demo input in {}: {e}",
            generated.display()
        )
    };
    let regional = super::write_inputs(&generated.join("regional"), p.reference, &p.leads)
        .map_err(write_err)?;
    let global = super::write_global_inputs(&generated.join("global"), p.reference, &p.leads)
        .map_err(write_err)?;
    let cfg = p.dir.join("leeward.toml");
    std::fs::write(&cfg, config_text(&p.dir))
        .map_err(|e| format!("cannot write {}: {e}", cfg.display()))?;
    let log = std::fs::File::create(p.dir.join("service.log"))
        .map_err(|e| format!("cannot write the service log: {e}"))?;
    let exe = std::env::current_exe().map_err(|e| format!("cannot find leeward itself: {e}"))?;
    let mut child = Command::new(exe)
        .args(["serve", "--config"])
        .arg(&cfg)
        .env("LEEWARD_LOG", "info")
        .stdout(Stdio::null())
        .stderr(log)
        .spawn()
        .map_err(|e| format!("cannot start leeward serve: {e}"))?;
    let state_dir = p.dir.join("state");
    let t0 = Instant::now();
    while read_state(&state_dir).map_or(true, |s| s.started.is_none()) {
        if t0.elapsed() > Duration::from_secs(30) || matches!(child.try_wait(), Ok(Some(_))) {
            stop(&mut child);
            return Err(format!(
                "the service did not start; see {}",
                p.dir.join("service.log").display()
            ));
        }
        std::thread::sleep(Duration::from_millis(50));
    }
    let mut arrived = Vec::new();
    for (k, lead) in p.leads.iter().enumerate() {
        for (feed, files) in [("regional", &regional), ("global", &global)] {
            let Some(f) = files.get(k) else { continue };
            if let Err(e) = deliver(f, &p.dir.join("incoming").join(feed)) {
                stop(&mut child);
                return Err(format!("cannot deliver {}: {e}", f.display()));
            }
            arrived.push((feed.to_string(), i64::from(*lead), unix_now()));
            println!(
                "  delivered {}",
                f.file_name()
                    .map(|n| n.to_string_lossy())
                    .unwrap_or_default()
            );
        }
        // The next step comes once this one is settled, as from a model
        // that writes a step while the last is post-processed: each step's
        // changes and images then find the step before it published,
        // however busy the machine.
        let t_step = Instant::now();
        while t_step.elapsed() < Duration::from_secs(120)
            && !rows(&state_dir, &arrived)
                .iter()
                .all(|r| r.published.is_some() || !r.note.is_empty())
        {
            std::thread::sleep(Duration::from_millis(50));
        }
        std::thread::sleep(p.pause);
    }
    let t0 = Instant::now();
    loop {
        let r = rows(&state_dir, &arrived);
        let settled = r
            .iter()
            .all(|r| r.published.is_some() || !r.note.is_empty());
        if settled || t0.elapsed() > Duration::from_secs(180) {
            // Later steps add changes to earlier files: let the last one finish.
            std::thread::sleep(Duration::from_millis(300));
            stop(&mut child);
            return Ok(rows(&state_dir, &arrived));
        }
        std::thread::sleep(Duration::from_millis(100));
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_demo_names_its_invented_centre() {
        let cfg = crate::config::Config::from_toml(&config_text(Path::new("/tmp/x")), "demo")
            .expect("the demo's configuration is valid");
        assert_eq!(
            cfg.output.institution(super::super::DEMO_CENTRE),
            super::super::DEMO_INSTITUTION
        );
        // Without it, centre 255 is said to be missing, never given a name.
        let plain = crate::config::Config::default();
        assert!(plain.output.institution(255).contains("255, missing"));
    }
}
