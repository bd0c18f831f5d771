//! A step's products published: changes in time, the file, what it adds to files
//! published before (changes and PV budgets), the cycle's tracks, the images, and the
//! caller's hook.
//!
//! In: the products made, the step and its [`Destination`]. Out: the file in place and
//! the [`StepReport`] completed. Steps processed side by side take turns here: the
//! caller's lock is held from reading earlier files to the hook.

use std::path::{Path, PathBuf};
use std::time::Instant;

use ndarray::{Array2, Array3};
use tracing::{info, warn};

use crate::changes;
use crate::config::Config;
use crate::diagnostics::budget;
use crate::geometry::{Grid, Horizontal};
use crate::outcome::StepOutcome;
use crate::output::cf::{write_step, Product, StepProducts, Vertical};
use crate::output::variables::changes::MSLP_TENDENCY;
use crate::pipeline::{grid_id, output_name, InputFile, Issue, Step, StepReport};

use super::columns::Columns;
use super::seal::Sealer;
use super::winds::Winds;
use super::Destination;

/// Where and how a step is published.
pub(super) struct Publishing<'a> {
    pub step: &'a Step,
    pub inputs: &'a [InputFile],
    pub cfg: &'a Config,
    pub out: &'a Destination<'a>,
    pub grid_suffix: Option<usize>,
    pub seal: &'a Sealer<'a>,
    /// The Coriolis parameter and the grid's turn from east, for the PV budget.
    pub f: Array2<f64>,
    pub rotation: Option<Array2<f64>>,
    /// The input's winds are along the grid's axes (flag table 3.3 bit 5).
    pub winds_grid_relative: bool,
}

/// What the families made, owned, so that what the file does not hold can be
/// let go once the file's contents are assembled.
pub(super) struct Made {
    pub fields: Vec<Product>,
    /// Thickness layers made, Pa.
    pub p_layers: Vec<[f64; 2]>,
    pub grid: Grid,
    pub lat: Array2<f64>,
    pub lon: Array2<f64>,
    pub cols: Columns,
    pub winds: Winds,
    /// The layer PV was made, so the PV budget can be.
    pub budget_layer: bool,
    /// The model's terrain, m, for the images' outline.
    pub terrain_m: Option<Array2<f32>>,
    pub t_compute: Instant,
}

/// What the file says of the input's columns and winds.
struct FromInput {
    /// Isobaric levels, Pa.
    levels: Vec<f64>,
    /// How values below ground are masked.
    masking: String,
    /// How the winds were read.
    winds: String,
}

/// The fields whose changes are taken, as published, with their coordinates.
struct Now<'a> {
    thick: Option<(&'a [f64], &'a Array3<f32>)>,
    mslp: Option<(&'a [f64], &'a Array3<f32>)>,
    r2r: changes::Fields<'a>,
}

/// Changes in time, then the file, then what follows it.
pub(super) fn finish(
    p: &Publishing<'_>,
    made: Made,
    mut rep: StepReport,
    issues: Vec<Issue>,
    t0: Instant,
) -> StepReport {
    let t_family = Instant::now();
    let Made {
        mut fields,
        p_layers,
        ..
    } = made;
    // Changes in time, from the published files of earlier steps and cycles.
    // The caller runs the steps of one run one at a time (the service chains
    // them), so that each sees what the ones before it published.
    let gid = grid_id(&p.step.key.grid_key);
    let run = run_of(p, &gid);
    let p_layer_coords: Vec<f64> = p_layers.iter().map(|l| 0.5 * (l[0] + l[1])).collect();
    // Changes are taken between values as published (bit-rounded), so that the
    // order in which steps and cycles arrive cannot change a single bit.
    let as_published: Vec<(&'static str, Array3<f32>)> = fields
        .iter()
        .filter(|f| matches!(f.spec.name, "thick" | "z" | "trop_p" | "mslp"))
        .map(|f| (f.spec.name, f.published(p.seal.kept.bits(f.spec.name))))
        .collect();
    let coords = [
        ("thick", p_layer_coords),
        ("z", made.cols.p.clone()),
        ("trop_p", p.cfg.isentropic.tropopause_pvu.clone()),
        ("mslp", Vec::new()),
    ];
    let now = now(p.cfg, &as_published, &coords);
    let change_products = changes_now(&run, p.cfg, &now);
    fields.extend(change_products.into_iter().map(|c| p.seal.seal(c)));
    rep.family_seconds
        .push(("changes_read", t_family.elapsed().as_secs_f64()));
    p.seal.seal_rest(&mut fields);
    // The input's columns and winds are spent once the file's description
    // is taken from them.
    let from_input = FromInput {
        levels: made.cols.p.clone(),
        masking: made.cols.masking.clone(),
        winds: made.winds.described.clone(),
    };
    drop(made.cols);
    drop(made.winds);
    let name = output_name(&p.step.key, p.grid_suffix);
    let dir = p.out.stage.unwrap_or(p.out.dir);
    if p.cfg.products.pv_budget && made.budget_layer {
        let t_budget = Instant::now();
        let budget = own_budget(p, &run, &made.grid, &dir.join(&name), &fields);
        rep.family_seconds
            .push(("pv_budget", t_budget.elapsed().as_secs_f64()));
        fields.extend(budget.into_iter().map(|b| p.seal.seal(b)));
    }
    let pack_seconds = p.seal.seconds();
    rep.family_seconds.push(("packing", pack_seconds));
    for (family, seconds) in &rep.family_seconds {
        tracing::debug!(cycle = %rep.cycle, step = rep.lead_hours, family, seconds, "diagnostic family timing");
    }
    let (fields, left_out) = crate::output::cf::leave_out_empty(fields);
    for (name, why) in &left_out {
        warn!(cycle = %rep.cycle, step = rep.lead_hours, variable = %name, reason = %why, "variable left out: no valid point");
    }
    rep.left_out = left_out
        .into_iter()
        .map(|(n, why)| format!("{n}: {why}"))
        .collect();
    rep.products = fields
        .iter()
        .flat_map(|f| crate::output::cf::file_names(f, &p_layers))
        .collect();
    rep.compute_seconds = made.t_compute.elapsed().as_secs_f64() - pack_seconds;
    let mut products = step_products(
        p,
        fields,
        p_layers,
        made.grid,
        (made.lat, made.lon),
        from_input,
    );
    let t_write = Instant::now();
    let tracks = p.cfg.products.cyclones && now.mslp.is_some();
    let set = crate::cyclones::cycle::settings(&p.cfg.cyclones).0;
    let (written, centres) = write_finding_centres(tracks.then_some(&set), dir, &name, &products);
    rep.write_seconds = t_write.elapsed().as_secs_f64() + pack_seconds;
    match written {
        Ok(path) => {
            if let Some(c) = centres {
                keep_centres(p, &path, &name, &set, &c);
            }
            let after = After {
                run: &run,
                now: &now,
                budget_layer: made.budget_layer,
                terrain_m: made.terrain_m.as_ref(),
            };
            keep_for_images(p.cfg, &mut products);
            super::give_back_free_memory();
            after_writing(p, &after, &path, &products, &mut rep);
            rep.outcome = StepOutcome::Made(path);
        }
        Err(e) => {
            warn!(cycle = %rep.cycle, step = rep.lead_hours, error = %e, "step not written");
            rep.outcome = StepOutcome::OutputFailed {
                reason: e.to_string(),
            };
        }
    }
    rep.issues.extend(issues);
    rep.seconds = t0.elapsed().as_secs_f64();
    rep
}

/// Write the step's file; with cyclone settings (`tracks`), find its centres from
/// the products on a thread of their own while it is written (the writer uses
/// one core), so that the tracks made after it need not read it back.
fn write_finding_centres(
    tracks: Option<&crate::cyclones::read::Settings>,
    dir: &Path,
    name: &str,
    products: &StepProducts,
) -> (
    Result<PathBuf, crate::output::cf::OutputError>,
    Option<crate::cyclones::read::StepCentres>,
) {
    let path = dir.join(name);
    std::thread::scope(|sc| {
        let centres = tracks
            .map(|set| sc.spawn(|| crate::cyclones::read::made_centres(products, &path, set)));
        let written = write_step(dir, name, products);
        let centres = centres.and_then(|h| h.join().ok()).and_then(Result::ok);
        (written, centres)
    })
}

/// The centres of the step just written at `path`, found from its products, kept
/// for its tracks: remembered for the file, or (a step staged for a batch job's
/// publication) written beside it for the tracks the service makes on taking it.
fn keep_centres(
    p: &Publishing<'_>,
    path: &Path,
    name: &str,
    set: &crate::cyclones::read::Settings,
    c: &crate::cyclones::read::StepCentres,
) {
    use crate::cyclones::{memo, read};
    if p.out.stage.is_none() {
        read::remember_written(path, set, c);
        return;
    }
    read::check_made(path, set, c);
    if let Err(e) = memo::write_made(path, name, set, c) {
        warn!(file = %path.display(), error = %e, "centres of the step not kept for its tracks");
    }
}

/// The step as the changes see it.
fn run_of<'a>(p: &'a Publishing<'_>, gid: &'a str) -> changes::Run<'a> {
    changes::Run {
        out_dir: p.out.store,
        centre: p.step.key.centre,
        grid_id: gid,
        member: p.step.key.member,
        reference_time: p.step.key.reference_time,
        valid_time: p.step.key.valid_time,
        stage: p.out.stage,
    }
}

/// The fields of this step whose changes are taken, as published: thickness and
/// mean sea-level pressure within the cycle, and those run-to-run changes compare
/// (used against the previous cycle now, and against a next cycle after publishing).
fn now<'a>(
    cfg: &Config,
    as_published: &'a [(&'static str, Array3<f32>)],
    coords: &'a [(&'static str, Vec<f64>); 4],
) -> Now<'a> {
    let find = |n: &str| as_published.iter().find(|(m, _)| *m == n).map(|(_, a)| a);
    let coords_of = |n: &str| {
        coords
            .iter()
            .find(|(m, _)| *m == n)
            .map(|(_, c)| c.as_slice())
            .unwrap_or(&[])
    };
    let pr = &cfg.products;
    let mut r2r: changes::Fields<'_> = Vec::new();
    if pr.run_to_run {
        for (name, c) in coords {
            if let Some(a) = find(name) {
                r2r.push((name, c.clone(), a));
            }
        }
    }
    Now {
        thick: find("thick")
            .filter(|_| pr.thickness_change)
            .map(|a| (coords_of("thick"), a)),
        mslp: find("mslp").map(|a| (&[][..], a)),
        r2r,
    }
}

/// This step's changes from the earlier steps and cycles already published.
fn changes_now(run: &changes::Run<'_>, cfg: &Config, now: &Now<'_>) -> Vec<Product> {
    let intervals = &cfg.changes.intervals_h;
    let mut out = Vec::new();
    if let Some(th) = now.thick {
        out.extend(changes::within_cycle(run, th, intervals));
    }
    if let Some(m) = now.mslp {
        out.extend(changes::within_cycle_of(run, MSLP_TENDENCY, m, intervals));
    }
    if cfg.products.run_to_run {
        out.extend(changes::run_to_run(run, &now.r2r));
    }
    out
}

/// The file's contents.
fn step_products(
    p: &Publishing<'_>,
    fields: Vec<Product>,
    p_layers: Vec<[f64; 2]>,
    grid: Grid,
    (lat, lon): (Array2<f64>, Array2<f64>),
    from_input: FromInput,
) -> StepProducts {
    let (key, cfg) = (&p.step.key, p.cfg);
    let mut inputs_used: Vec<String> = p
        .step
        .fields
        .iter()
        .map(|fr| {
            p.inputs[fr.file]
                .path
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default()
        })
        .collect();
    inputs_used.sort();
    inputs_used.dedup();
    StepProducts {
        centre: key.centre,
        grid_id: grid_id(&key.grid_key),
        member: key.member,
        institution: cfg.output.institution(key.centre),
        reference_time: key.reference_time,
        valid_time: key.valid_time,
        grid,
        lat,
        lon,
        levels: if fields.iter().any(|f| f.vertical == Vertical::Pressure) {
            from_input.levels
        } else {
            Vec::new()
        },
        theta_levels: cfg.isentropic.surfaces.clone(),
        pv_levels: cfg.isentropic.tropopause_pvu.clone(),
        layers: cfg.isentropic.layers.clone(),
        p_layers,
        fields,
        masking: from_input.masking,
        winds: from_input.winds,
        inputs: inputs_used,
        deflate: cfg.output.deflate_level,
        kept_bits: p.seal.kept.clone(),
    }
}

/// Let go of the products written that no image is drawn from, before the
/// changes, budgets and tracks, which read what they need from the files.
fn keep_for_images(cfg: &Config, products: &mut StepProducts) {
    let drawn: Vec<String> = if cfg.quicklook.enabled {
        cfg.quicklook
            .images
            .iter()
            .filter_map(|s| crate::output::images::parse(s).ok())
            .map(|w| w.variable)
            .collect()
    } else {
        Vec::new()
    };
    products
        .fields
        .retain(|f| drawn.iter().any(|d| d == f.spec.name));
}

/// What the work after writing needs besides the file.
struct After<'a> {
    run: &'a changes::Run<'a>,
    now: &'a Now<'a>,
    budget_layer: bool,
    terrain_m: Option<&'a Array2<f32>>,
}

/// With the file written: its changes added to later files, the PV budgets, the
/// cycle's tracks and the images.
fn after_writing(
    p: &Publishing<'_>,
    a: &After<'_>,
    path: &Path,
    products: &StepProducts,
    rep: &mut StepReport,
) {
    let (cfg, pr) = (p.cfg, &p.cfg.products);
    let (deflate, kept, intervals) = (
        cfg.output.deflate_level,
        &p.seal.kept,
        &cfg.changes.intervals_h,
    );
    let t_changes = Instant::now();
    rep.updated = changes::update_later(
        a.run,
        path,
        a.now.thick,
        &a.now.r2r,
        intervals,
        deflate,
        kept,
    );
    if let Some(m) = a.now.mslp {
        rep.updated.extend(changes::update_later_of(
            a.run,
            MSLP_TENDENCY,
            m,
            intervals,
            deflate,
            kept,
        ));
    }
    if pr.pv_budget && a.budget_layer {
        rep.updated
            .extend(next_budget(p, a.run, path, &products.grid));
    }
    // The cycle's tracks, from every step published so far; a batch job's
    // staged step is not published yet: the service makes them on taking it.
    if pr.cyclones && p.out.stage.is_none() && a.now.mslp.is_some() {
        rep.tracks = crate::cyclones::cycle::update(
            a.run,
            path,
            &cfg.cyclones,
            &cfg.quicklook,
            Some(&products.grid),
        );
    }
    rep.changes_seconds = t_changes.elapsed().as_secs_f64();
    info!(cycle = %rep.cycle, step = rep.lead_hours, file = %path.display(), products = ?rep.products, "step written");
    if cfg.quicklook.enabled {
        let wanted: Vec<_> = cfg
            .quicklook
            .images
            .iter()
            .filter_map(|s| crate::output::images::parse(s).ok())
            .collect();
        let look = crate::output::images::Look {
            settings: &cfg.quicklook,
            terrain: a.terrain_m.map(|t| t.view()),
        };
        let t_images = Instant::now();
        rep.images = crate::output::images::write_images(path, products, &wanted, &look);
        rep.images_seconds = t_images.elapsed().as_secs_f64();
    }
}

/// This step's PV budget against the previous step of its cycle already
/// published, from its own products as the file at `path` will hold them:
/// computed before the file is written, so that it is published once, whole.
fn own_budget(
    p: &Publishing<'_>,
    run: &changes::Run<'_>,
    grid: &Grid,
    path: &Path,
    fields: &[Product],
) -> Vec<Product> {
    let this = changes::Source::Made {
        path,
        products: fields,
        kept: &p.seal.kept,
    };
    let max = p.cfg.changes.budget_max_interval_h;
    changes::budget_from_previous(run, &this, &geometry(p, grid), max)
}

/// The PV budget of the next step of the cycle, published before this one,
/// added to its file.
fn next_budget(
    p: &Publishing<'_>,
    run: &changes::Run<'_>,
    path: &Path,
    grid: &Grid,
) -> Vec<PathBuf> {
    changes::update_next_budget(
        run,
        path,
        &geometry(p, grid),
        p.cfg.changes.budget_max_interval_h,
        p.cfg.output.deflate_level,
        &p.seal.kept,
    )
}

/// The grid as the PV budget's trajectories see it.
fn geometry<'a>(p: &'a Publishing<'_>, grid: &'a Grid) -> changes::Geometry<'a> {
    let cfg = p.cfg;
    let layout = match &grid.horizontal {
        Horizontal::LatLon { lat, lon, .. } => budget::Layout::Sphere {
            lat,
            lon,
            radius: grid.radius(),
            periodic: grid.periodic(),
        },
        Horizontal::Rotated { rlat, rlon, .. } => budget::Layout::Sphere {
            lat: rlat,
            lon: rlon,
            radius: grid.radius(),
            periodic: grid.periodic(),
        },
        Horizontal::Projected { proj, x, y } => budget::Layout::Projected {
            proj: *proj,
            earth: grid.earth,
            x0: x[0],
            y0: y[0],
            dx: if x.len() > 1 { x[1] - x[0] } else { f64::NAN },
            dy: if y.len() > 1 { y[1] - y[0] } else { f64::NAN },
        },
    };
    let trajectories = budget::Settings {
        max_substep: cfg.changes.budget_max_substep_h * 3600.0,
        tolerance: cfg.changes.budget_tolerance * layout.grid_length(),
        max_iterations: budget::MAX_ITERATIONS,
    };
    changes::Geometry {
        layout,
        f: &p.f,
        rotation: p.rotation.as_ref(),
        winds_grid_relative: p.winds_grid_relative,
        periodic: grid.periodic(),
        trajectories,
    }
}
