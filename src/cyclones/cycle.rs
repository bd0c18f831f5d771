//! A cycle's tracks, made again from every step of the cycle published so
//! far whenever one more is published, and written beside the step files:
//! `<centre>_<cycle>_cyclones.nc` (CF discrete sampling geometry, trajectories
//! as a contiguous ragged array) and `<centre>_<cycle>_cyclones.geojson`
//! (RFC 7946), each written under a hidden name, fsynced and renamed into
//! place. The tracks depend only on the published steps, never on the order in
//! which they arrived.

use std::path::{Path, PathBuf};

use tracing::{info, warn};

use super::detect::Settings as DetectSettings;
use super::memo::Memo;
use super::read::{step_centres_cached, Settings, StepCentres};
use super::track::{deepening, link, Fix, Settings as TrackSettings, Step};
use crate::changes::Run;
use crate::geometry::Grid;
use crate::output::store::published_where;

pub use super::tracked::Cycle;

/// The settings of the configuration, in metres and pascals.
pub fn settings(c: &crate::config::Cyclones) -> (Settings, f64) {
    (
        Settings {
            detect: DetectSettings {
                interval: c.contour_interval_hpa * 100.0,
                max_radius: c.max_contour_radius_km * 1000.0,
            },
            radius: c.radius_km * 1000.0,
        },
        c.search_radius_km * 1000.0,
    )
}

/// Link the centres of `steps` (any order) into tracks.
pub fn build(
    mut steps: Vec<StepCentres>,
    settings: Settings,
    search_radius_6h: f64,
) -> Option<Cycle> {
    steps.sort_by_key(|s| s.valid_time);
    steps.dedup_by_key(|s| s.valid_time);
    let reference_time = steps.first()?.reference_time;
    let radius = steps.first()?.radius;
    let linked: Vec<Step> = steps
        .iter()
        .map(|s| Step {
            hours: (s.valid_time - reference_time).num_seconds() as f64 / 3600.0,
            fixes: s
                .centres
                .iter()
                .map(|(c, f)| Fix {
                    lat: c.lat,
                    lon: c.lon,
                    pressure: c.pressure,
                    steer: (f.steer_u, f.steer_v),
                })
                .collect(),
        })
        .collect();
    let tracks = link(
        &linked,
        &TrackSettings {
            search_radius_6h,
            radius,
        },
    );
    let deepening = tracks.iter().map(|t| deepening(&linked, t)).collect();
    Some(Cycle {
        reference_time,
        steps,
        tracks,
        deepening,
        settings,
        search_radius_6h,
    })
}

/// The name of a cycle's files, from a step file's name: its lead
/// (`_024h`) becomes `_cyclones`, so grid number and member stay.
pub fn base_name(step_file: &Path) -> String {
    let stem = step_file
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let parts: Vec<&str> = stem.split('_').collect();
    let lead = parts.iter().position(|p| {
        p.len() >= 2 && p.ends_with('h') && p[..p.len() - 1].bytes().all(|b| b.is_ascii_digit())
    });
    match lead {
        Some(k) => {
            let mut v: Vec<String> = parts.iter().map(|s| s.to_string()).collect();
            v[k] = "cyclones".into();
            v.join("_")
        }
        None => format!("{stem}_cyclones"),
    }
}

/// After a step is published: make the cycle's tracks from every step of it
/// published in `run`'s store and write them beside `this_file`. Returns the
/// files written. A step file that cannot be read is passed over and said so.
/// `grid` is the grid of the cycle's steps, for the quicklook's coastlines.
pub fn update(
    run: &Run<'_>,
    this_file: &Path,
    cfg: &crate::config::Cyclones,
    look: &crate::config::Quicklooks,
    grid: Option<&Grid>,
) -> Vec<PathBuf> {
    let files: Vec<PathBuf> = cycle_files(run).into_iter().map(|p| p.path).collect();
    let dir = this_file.parent().unwrap_or(Path::new("."));
    let base = base_name(this_file);
    let (set, _) = settings(cfg);
    let read = |p: &PathBuf| step_centres_cached(p, &set);
    match from_files(&files, cfg, read) {
        Some(cycle) => {
            said(run, &cycle, None);
            write_all(&cycle, dir, &base, look, grid)
                .into_iter()
                .map(|(p, _)| p)
                .collect()
        }
        None => Vec::new(),
    }
}

/// A step being published (`product`: its staged file and its place) with
/// the copies of published files it revises (`revised`, the same): make the
/// cycle's tracks as they will be once it is published, into `stage`. The
/// steps are read from the store, except those the publication replaces,
/// which are read from their staged copies, so the tracks are renamed into
/// place with the step as one recorded act and a stop cannot leave them
/// behind. A step file's centres are taken from the memo in `stage`
/// ([`super::memo`]) where it knows the file as it is, and the memo is
/// written back there. Returns (staged file, its place) for each file written.
pub fn staged(
    run: &Run<'_>,
    product: (&Path, &Path),
    revised: &[(&Path, &Path)],
    stage: &Path,
    cfg: &crate::config::Cyclones,
    look: &crate::config::Quicklooks,
    grid: Option<&Grid>,
) -> Vec<(PathBuf, PathBuf)> {
    let (staged_product, target) = product;
    // (where to read it, its name once published)
    let mut files: Vec<(PathBuf, String)> = cycle_files(run)
        .into_iter()
        .filter(|p| p.path != target)
        .map(|p| {
            let read = revised
                .iter()
                .find(|(_, t)| *t == p.path)
                .map_or(p.path.clone(), |(s, _)| s.to_path_buf());
            (read, file_name(&p.path))
        })
        .collect();
    files.push((staged_product.to_path_buf(), file_name(target)));
    let memo_path = stage.join(super::memo::FILE);
    let (set, _) = settings(cfg);
    let mut memo = Memo::load(&memo_path, &set);
    let read = |(p, name): &(PathBuf, String)| memo.centres(p, name, &set);
    let made = from_files(&files, cfg, read);
    if let Some(c) = &made {
        said(run, c, Some(&memo));
    }
    if let Err(e) = memo.save(&memo_path) {
        warn!(file = %memo_path.display(), error = %e, "memo of the cycle's centres not written");
    }
    let Some(cycle) = made else {
        return Vec::new();
    };
    let dir = stage.join("tracks");
    let into = target.parent().unwrap_or(Path::new("."));
    if let Err(e) = std::fs::create_dir_all(&dir) {
        warn!(file = %dir.display(), error = %e, "cyclone tracks not written");
        return Vec::new();
    }
    write_all(&cycle, &dir, &base_name(target), look, grid)
        .into_iter()
        .map(|(p, name)| (p, into.join(name)))
        .collect()
}

/// Say that the tracks of `c` were made, and where the centres came from.
fn said(run: &Run<'_>, c: &Cycle, memo: Option<&Memo>) {
    info!(
        cycle = %run.reference_time.format("%Y-%m-%dT%H:%MZ"),
        steps = c.steps.len(),
        tracks = c.tracks.len(),
        steps_from_memo = memo.map(|m| m.hits),
        steps_read = memo.map(|m| m.reads),
        "cyclone tracks made"
    );
}

/// A step file to read: where it is.
trait Filelike {
    fn path(&self) -> &Path;
}

impl Filelike for PathBuf {
    fn path(&self) -> &Path {
        self
    }
}

impl Filelike for (PathBuf, String) {
    fn path(&self) -> &Path {
        &self.0
    }
}

fn file_name(p: &Path) -> String {
    p.file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default()
}

/// The steps of `run`'s cycle published in its store.
fn cycle_files(run: &Run<'_>) -> Vec<crate::output::store::Published> {
    published_where(
        run.out_dir,
        run.centre,
        run.grid_id,
        run.member,
        run.reference_time,
        |r, _| r == run.reference_time,
    )
}

/// The tracks of the cycle whose step files are `files`; `None` when no step
/// could be read. `read` gives a file's centres.
fn from_files<F: Filelike>(
    files: &[F],
    cfg: &crate::config::Cyclones,
    mut read: impl FnMut(&F) -> Result<StepCentres, String>,
) -> Option<Cycle> {
    let (set, search) = settings(cfg);
    let mut steps = Vec::with_capacity(files.len());
    for f in files {
        match read(f) {
            Ok(s) => steps.push(s),
            Err(e) => {
                warn!(file = %f.path().display(), reason = %e, "step passed over by the cyclone tracks")
            }
        }
    }
    build(steps, set, search)
}

/// Write a cycle's tracks into `dir` as `<base>.nc`, `<base>.geojson` and,
/// with quicklooks on, `<base>.png`, each atomically. Returns (path, file
/// name) of each file written; one that cannot be written is said so.
fn write_all(
    cycle: &Cycle,
    dir: &Path,
    base: &str,
    look: &crate::config::Quicklooks,
    grid: Option<&Grid>,
) -> Vec<(PathBuf, String)> {
    let mut written = Vec::new();
    let nc = format!("{base}.nc");
    match super::write::netcdf(&dir.join(&nc), cycle) {
        Ok(()) => written.push((dir.join(&nc), nc)),
        Err(e) => warn!(file = %dir.join(&nc).display(), error = %e, "cyclone tracks not written"),
    }
    let gj = format!("{base}.geojson");
    let text = super::write::geojson(cycle).to_string();
    match crate::output::write_file_atomic(&dir.join(&gj), text.as_bytes()) {
        Ok(()) => written.push((dir.join(&gj), gj)),
        Err(e) => warn!(file = %dir.join(&gj).display(), error = %e, "cyclone tracks not written"),
    }
    if look.enabled {
        let png = format!("{base}.png");
        match quicklook(cycle, look, grid).and_then(|b| {
            crate::output::write_file_atomic(&dir.join(&png), &b).map_err(|e| e.to_string())
        }) {
            Ok(()) => written.push((dir.join(&png), png)),
            Err(e) => {
                warn!(file = %dir.join(&png).display(), error = %e, "cyclone quicklook not written")
            }
        }
    }
    written
}

/// The mean sea-level pressure of the cycle's latest step with every track drawn
/// over it (a dot at each point, a larger one at its last), as PNG bytes, drawn
/// as the step quicklooks are: the fixed `mslp` scale (or the one `[quicklook]`
/// sets for `mslp`) and the land outline `[quicklook]` asks for, coastlines
/// placed by `grid` or the model's terrain where the step has it.
pub fn quicklook(
    c: &Cycle,
    look: &crate::config::Quicklooks,
    grid: Option<&Grid>,
) -> Result<Vec<u8>, String> {
    use crate::config::OutlineKind;
    use crate::output::images::{scale_of, Look};
    use crate::output::quicklook::{render_with_marks, Outline, Quicklook};
    let last = c.steps.last().ok_or("no step")?;
    let (m, lat, lon, orog) =
        super::read::mslp_map(&last.path).ok_or("no mslp in the latest step")?;
    let hpa = m.mapv(|x| x / 100.0);
    let marks: Vec<Vec<(f64, f64)>> = c
        .tracks
        .iter()
        .map(|t| {
            t.iter()
                .map(|&(s, k)| {
                    let centre = &c.steps[s].centres[k].0;
                    (centre.j as f64, centre.i as f64)
                })
                .collect()
        })
        .collect();
    let lead = (last.valid_time - c.reference_time).num_hours();
    let title = format!(
        "mslp with the cycle's {} cyclone tracks: pressure reduced to mean sea level",
        c.tracks.len()
    );
    let subtitle = format!(
        "valid {} UTC  (cycle {} UTC +{lead} h); tracks of {} steps",
        last.valid_time.format("%Y-%m-%d %H:%M"),
        c.reference_time.format("%Y-%m-%d %H:%M"),
        c.steps.len()
    );
    let outline = match (look.outline, grid, &orog) {
        (OutlineKind::Coastlines, Some(g), _) if g.shape() == hpa.dim() => Outline::Coastlines(g),
        (OutlineKind::Terrain, _, Some(t)) => Outline::Terrain {
            height: t.view(),
            levels: &look.terrain_m,
        },
        _ => Outline::None,
    };
    let styles = Look {
        settings: look,
        terrain: None,
    };
    let (scale, _) = scale_of(&styles, "mslp", "", &hpa.view());
    let q = Quicklook {
        values: hpa.view(),
        lat: lat.view(),
        lon: lon.view(),
        title: &title,
        subtitle: &subtitle,
        units: "hPa",
        scale,
        outline,
        contour: None,
    };
    render_with_marks(&q, &marks)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_keep_centre_cycle_grid_and_member() {
        let b = |s: &str| base_name(Path::new(s));
        assert_eq!(
            b("/o/c255_20260314T0000Z_024h.nc"),
            "c255_20260314T0000Z_cyclones"
        );
        assert_eq!(
            b("ecmwf_20260314T1200Z_240h_g2_m07.nc"),
            "ecmwf_20260314T1200Z_cyclones_g2_m07"
        );
        assert_eq!(b("odd.nc"), "odd_cyclones");
    }
}
