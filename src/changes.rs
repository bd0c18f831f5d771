//! Changes in time: thickness change within a cycle over configured
//! intervals, and the run-to-run change of thickness, heights and dynamic
//! tropopause pressure at the same valid time.
//!
//! In: the products of the step being published and the output directory,
//! whose published files are the only memory across steps and cycles. Out:
//! change products for this step (its earlier steps or cycle already there),
//! and updates of later steps or the next cycle published before this one
//! (steps arrive in any order). A change is computed only from published
//! files, which leeward writes only once a step is complete.
//!
//! Here the files are found, read and added to; the variables written are in
//! [`crate::output::variables::changes`] and [`crate::output::variables::budget`],
//! the formulas at each point in [`crate::diagnostics::change`] and
//! [`crate::diagnostics::budget`].

use std::path::{Path, PathBuf};

use chrono::{NaiveDateTime, TimeDelta};
use ndarray::Array3;
use tracing::{info, warn};

use crate::diagnostics::change::difference;
use crate::output::cf::{Product, Vertical};
use crate::output::precision::KeptBits;
use crate::output::store::{
    add_variables, add_variables_to, level_shape, published_where, read_field, read_level,
    Published,
};
use crate::output::variables::budget::{self, NOT_CONVERGED_ATTR};
use crate::output::variables::changes::{r2r_spec, Tendency, THICK_TENDENCY};

/// What identifies the model run a step belongs to.
#[derive(Debug, Clone)]
pub struct Run<'a> {
    /// Output directory.
    pub out_dir: &'a Path,
    /// Centre.
    pub centre: u16,
    /// Grid fingerprint.
    pub grid_id: &'a str,
    /// Ensemble member.
    pub member: Option<u8>,
    /// Cycle.
    pub reference_time: NaiveDateTime,
    /// Valid time of this step.
    pub valid_time: NaiveDateTime,
    /// Where additions to files already published go instead of into the
    /// files themselves (a batch job's staging directory), if anywhere.
    pub stage: Option<&'a Path>,
}

impl Run<'_> {
    /// Where an addition to `path` is written: `path` itself, or its staged
    /// copy `<stage>/updates/<cycle directory>/<name>` when this run stages.
    /// A file inside the staging directory (the step's own) is written in place.
    pub fn staged(&self, path: &Path) -> PathBuf {
        match self.stage {
            Some(stage) if !path.starts_with(stage) => {
                let name = path.file_name().unwrap_or_default();
                let parent = path
                    .parent()
                    .and_then(|p| p.file_name())
                    .unwrap_or_default();
                stage.join("updates").join(parent).join(name)
            }
            _ => path.to_path_buf(),
        }
    }
}

fn same_coords(a: &[f64], b: &[f64]) -> bool {
    a.len() == b.len()
        && a.iter()
            .zip(b)
            .all(|(x, y)| (x - y).abs() < 1e-6 * x.abs().max(1.0))
}

/// The fields a change needs from this step: (variable name, vertical coordinate values, data).
pub type Fields<'a> = Vec<(&'static str, Vec<f64>, &'a Array3<f32>)>;

fn earlier_value(path: &Path, name: &str, coords: &[f64]) -> Option<Array3<f32>> {
    let (c, a) = read_field(path, name)?;
    same_coords(&c, coords).then_some(a)
}

/// Thickness changes for this step from earlier steps already published.
pub fn within_cycle(
    run: &Run<'_>,
    thick: (&[f64], &Array3<f32>),
    intervals: &[u32],
) -> Vec<Product> {
    within_cycle_of(run, THICK_TENDENCY, thick, intervals)
}

/// Changes of the field `what` for this step from earlier steps already published.
pub fn within_cycle_of(
    run: &Run<'_>,
    what: Tendency,
    this: (&[f64], &Array3<f32>),
    intervals: &[u32],
) -> Vec<Product> {
    let files = published_where(
        run.out_dir,
        run.centre,
        run.grid_id,
        run.member,
        run.reference_time,
        |r, v| r == run.reference_time && v < run.valid_time,
    );
    let mut out = Vec::new();
    for &h in intervals {
        let Some(dt) = TimeDelta::try_hours(i64::from(h)) else {
            continue;
        };
        let want = run.valid_time - dt;
        let Some(earlier) = files
            .iter()
            .find(|p| p.reference_time == run.reference_time && p.valid_time == want)
        else {
            continue;
        };
        if let Some(d) = earlier_value(&earlier.path, what.name, this.0)
            .and_then(|e| difference(this.1.view(), e.view()))
        {
            info!(file = %earlier.path.display(), hours = h, field = what.name, "change from an earlier step");
            out.push(Product::new((what.spec)(h), what.vertical, d));
        }
    }
    out
}

/// Run-to-run changes for this step from the previous cycle's published file at the same valid time.
pub fn run_to_run(run: &Run<'_>, fields: &Fields<'_>) -> Vec<Product> {
    let files = published_where(
        run.out_dir,
        run.centre,
        run.grid_id,
        run.member,
        run.reference_time,
        |r, v| v == run.valid_time && r < run.reference_time,
    );
    let Some(prev) = files
        .iter()
        .filter(|p| p.valid_time == run.valid_time && p.reference_time < run.reference_time)
        .max_by_key(|p| p.reference_time)
    else {
        return Vec::new();
    };
    r2r_products(&prev.path, fields)
}

fn r2r_products(earlier: &Path, fields: &Fields<'_>) -> Vec<Product> {
    let mut out = Vec::new();
    for (name, coords, data) in fields {
        let Some((spec, vertical)) = r2r_spec(name) else {
            continue;
        };
        if let Some(d) =
            earlier_value(earlier, name, coords).and_then(|e| difference(data.view(), e.view()))
        {
            let mut p = Product::new(spec, vertical, d);
            p.notes.push((
                "leeward_previous_cycle_file",
                earlier
                    .file_name()
                    .map(|n| n.to_string_lossy().into_owned())
                    .unwrap_or_default(),
            ));
            out.push(p);
        }
    }
    out
}

/// Add `products` to the published `path` (or to its staged copy, see
/// [`Run::staged`]); returns the file written.
fn update(
    run: &Run<'_>,
    path: &Path,
    products: Vec<Product>,
    deflate: i32,
    kept: &KeptBits,
) -> Option<PathBuf> {
    // Nothing that holds no value is added to a file.
    let (products, left_out) = crate::output::cf::leave_out_empty(products);
    for (name, why) in &left_out {
        info!(file = %path.display(), variable = %name, reason = %why, "change left out: no valid point");
    }
    if products.is_empty() {
        return None;
    }
    let target = run.staged(path);
    let written = if target == path {
        add_variables(path, &products, deflate, kept)
    } else {
        let from = if target.exists() {
            target.clone()
        } else {
            path.to_path_buf()
        };
        std::fs::create_dir_all(target.parent().unwrap_or(Path::new(".")))
            .map_err(|source| crate::output::cf::OutputError::Io {
                path: target.clone(),
                source,
            })
            .and_then(|()| add_variables_to(&from, &target, &products, deflate, kept))
    };
    match written {
        Ok(()) => Some(target),
        Err(e) => {
            warn!(file = %path.display(), error = %e, "could not add changes to a published step");
            None
        }
    }
}

/// After this step is published: add its contribution to steps and cycles that were
/// published before it but come after it in time (steps arriving in any order).
/// Returns the files updated.
pub fn update_later(
    run: &Run<'_>,
    this_file: &Path,
    thick: Option<(&[f64], &Array3<f32>)>,
    fields: &Fields<'_>,
    intervals: &[u32],
    deflate: i32,
    kept: &KeptBits,
) -> Vec<PathBuf> {
    let files = published_where(
        run.out_dir,
        run.centre,
        run.grid_id,
        run.member,
        run.reference_time,
        |r, v| {
            (r == run.reference_time && v > run.valid_time)
                || (v == run.valid_time && r > run.reference_time)
        },
    );
    let mut updated = Vec::new();
    if let Some(thick) = thick {
        updated.extend(later_in_cycle(
            run,
            &files,
            THICK_TENDENCY,
            thick,
            intervals,
            deflate,
            kept,
        ));
    }
    // The next cycle at the same valid time, if this cycle is its previous one.
    let next = files
        .iter()
        .filter(|p| p.valid_time == run.valid_time && p.reference_time > run.reference_time)
        .min_by_key(|p| p.reference_time);
    if let Some(next) = next {
        let between = files.iter().any(|p: &Published| {
            p.valid_time == run.valid_time
                && p.reference_time > run.reference_time
                && p.reference_time < next.reference_time
        });
        if !between {
            let mut prods = Vec::new();
            for (name, coords, this) in fields {
                let Some((spec, vertical)) = r2r_spec(name) else {
                    continue;
                };
                if let Some(d) = earlier_value(&next.path, name, coords)
                    .and_then(|l| difference(l.view(), this.view()))
                {
                    let mut p = Product::new(spec, vertical, d);
                    let name = this_file
                        .file_name()
                        .map(|n| n.to_string_lossy().into_owned());
                    p.notes
                        .push(("leeward_previous_cycle_file", name.unwrap_or_default()));
                    prods.push(p);
                }
            }
            updated.extend(update(run, &next.path, prods, deflate, kept));
        }
    }
    updated
}

/// This step's contribution to the changes of `what` in the steps of its cycle
/// published before it and valid an interval later (`files`: those published).
fn later_in_cycle(
    run: &Run<'_>,
    files: &[Published],
    what: Tendency,
    (coords, this): (&[f64], &Array3<f32>),
    intervals: &[u32],
    deflate: i32,
    kept: &KeptBits,
) -> Vec<PathBuf> {
    let mut updated = Vec::new();
    for &h in intervals {
        let Some(dt) = TimeDelta::try_hours(i64::from(h)) else {
            continue;
        };
        let later_valid = run.valid_time + dt;
        let Some(later) = files
            .iter()
            .find(|p| p.reference_time == run.reference_time && p.valid_time == later_valid)
        else {
            continue;
        };
        if let Some(d) = earlier_value(&later.path, what.name, coords)
            .and_then(|l| difference(l.view(), this.view()))
        {
            let prods = vec![Product::new((what.spec)(h), what.vertical, d)];
            updated.extend(update(run, &later.path, prods, deflate, kept));
        }
    }
    updated
}

/// After this step is published: its contribution to the changes of `what` in
/// later steps of its cycle published before it (steps arriving in any order).
pub fn update_later_of(
    run: &Run<'_>,
    what: Tendency,
    this: (&[f64], &Array3<f32>),
    intervals: &[u32],
    deflate: i32,
    kept: &KeptBits,
) -> Vec<PathBuf> {
    let files = published_where(
        run.out_dir,
        run.centre,
        run.grid_id,
        run.member,
        run.reference_time,
        |r, v| r == run.reference_time && v > run.valid_time,
    );
    later_in_cycle(run, &files, what, this, intervals, deflate, kept)
}

/// Points whose budget trajectories did not converge in a published file: the sum
/// of [`NOT_CONVERGED_ATTR`] over its flag variables, None where it has no budget.
pub fn not_converged_in(path: &Path) -> Option<u64> {
    crate::output::quiet_hdf5_errors();
    let f = netcdf::open(path).ok()?;
    let mut total = None;
    for name in [budget::UNCONVERGED.name, budget::DPVDT_UNCONVERGED.name] {
        let Some(v) = f.variable(name) else { continue };
        // A number (this layout), or text (files of the layout before).
        let n = match v.attribute(NOT_CONVERGED_ATTR).map(|a| a.value()) {
            Some(Ok(netcdf::AttributeValue::Double(x))) if x >= 0.0 => Some(x as u64),
            Some(Ok(netcdf::AttributeValue::Str(s))) => s.trim().parse::<u64>().ok(),
            _ => None,
        };
        if let Some(n) = n {
            total = Some(total.unwrap_or(0) + n);
        }
    }
    total
}

/// Grid geometry for the budget's trajectories.
pub struct Geometry<'a> {
    /// Trajectory layout of the grid.
    pub layout: crate::diagnostics::budget::Layout<'a>,
    /// Coriolis parameter at every point.
    pub f: &'a ndarray::Array2<f64>,
    /// Angle from east to grid x (None when axes are east and north).
    pub rotation: Option<&'a ndarray::Array2<f64>>,
    /// Whether the files' isentropic winds are along the grid's axes already
    /// (layer-mean winds always are).
    pub winds_grid_relative: bool,
    /// Periodic in x.
    pub periodic: bool,
    /// How trajectories are traced.
    pub trajectories: crate::diagnostics::budget::Settings,
}

fn to_grid(
    g: &Geometry<'_>,
    u: &ndarray::Array2<f64>,
    v: &ndarray::Array2<f64>,
) -> (ndarray::Array2<f64>, ndarray::Array2<f64>) {
    match (g.rotation, g.winds_grid_relative) {
        (Some(alpha), false) => {
            crate::diagnostics::vorticity::earth_to_grid(u.view(), v.view(), alpha.view())
        }
        _ => (u.clone(), v.clone()),
    }
}

/// Where a PV budget reads its fields, one level at a time: a published file,
/// or the products of the step about to be written, as its readers will get them
/// (bit-rounded, in the file's units), so that the budget is the same bit for bit
/// whichever of the two steps is written first.
pub enum Source<'a> {
    /// A published file, open.
    File {
        /// Its path, named in logs.
        path: &'a Path,
        /// The file.
        file: netcdf::File,
    },
    /// A step's products, packed for writing, and the file they will be written to.
    Made {
        /// The file the products will be written to, named in logs.
        path: &'a Path,
        /// The products.
        products: &'a [Product],
        /// The kept bits the writer rounds plain products to.
        kept: &'a KeptBits,
    },
}

impl<'a> Source<'a> {
    /// The published file at `path`, opened; None where it cannot be.
    pub fn file(path: &'a Path) -> Option<Self> {
        crate::output::quiet_hdf5_errors();
        match netcdf::open(path) {
            Ok(file) => Some(Source::File { path, file }),
            Err(e) => {
                warn!(file = %path.display(), error = %e, "PV budget: cannot open a published step");
                None
            }
        }
    }

    fn path(&self) -> &Path {
        match self {
            Source::File { path, .. } | Source::Made { path, .. } => path,
        }
    }

    fn product(&self, name: &str) -> Option<&Product> {
        match self {
            Source::Made { products, .. } => products.iter().find(|p| p.spec.name == name),
            Source::File { .. } => None,
        }
    }

    /// (levels, rows, columns) of the field `name`; None where there is no such
    /// field (a product without a valid point is not written, so not there).
    fn shape(&self, name: &str) -> Option<(usize, usize, usize)> {
        match self {
            Source::File { file, .. } => level_shape(&file.variable(name)?),
            Source::Made { .. } => Some(self.product(name).filter(|p| p.valid_points() > 0)?.dim()),
        }
    }

    /// Level `k` of the field `name`, NaN where missing.
    fn level(&self, name: &str, k: usize) -> Option<ndarray::Array2<f64>> {
        let a = match self {
            Source::File { file, .. } => read_level(&file.variable(name)?, k)?,
            Source::Made { kept, .. } => self.product(name)?.published_level(k, kept.bits(name)),
        };
        Some(a.mapv(f64::from))
    }

    /// The shapes of every field of `names`, or None if one is missing.
    fn shapes(&self, names: &[&str]) -> Option<Vec<(usize, usize, usize)>> {
        names.iter().map(|n| self.shape(n)).collect()
    }
}

/// Numbers every budget variable carries: the interval and how trajectories were traced.
fn budget_notes(g: &Geometry<'_>, dt_h: f64) -> Vec<(&'static str, f64)> {
    let t = &g.trajectories;
    vec![
        ("leeward_budget_interval_h", dt_h),
        (
            "leeward_trajectory_substep_h",
            dt_h / (dt_h * 3600.0 / t.max_substep).ceil().max(1.0),
        ),
        ("leeward_trajectory_tolerance_m", t.tolerance),
    ]
}

/// A flag variable's values from trajectory outcomes: 0 converged, 1 not, NaN none.
fn flag(status: crate::diagnostics::budget::Status) -> f32 {
    use crate::diagnostics::budget::Status;
    match status {
        Status::Converged => 0.0,
        Status::NotConverged => 1.0,
        Status::None => f32::NAN,
    }
}

/// The levels a budget can take of `names` in both sources: None where a
/// field is missing; (levels of the later step's first field, levels in both,
/// rows, columns) otherwise.
fn budget_levels(
    (old, new): (&Source<'_>, &Source<'_>),
    names: &[&str],
) -> Option<(usize, usize, usize, usize)> {
    let (so, sn) = (old.shapes(names)?, new.shapes(names)?);
    let (n, ny, nx) = sn[0];
    let both = so.iter().chain(&sn).map(|s| s.0).min().unwrap_or(0);
    Some((n, both, ny, nx))
}

/// Levels 0..n of `names`, old and new, handed to `work` one level at a time,
/// read a level ahead on a thread of their own: reading (single-threaded in
/// libnetcdf) overlaps the trajectories of the level before. Stops at the
/// first level missing or `work` returning None, and then returns None.
fn level_by_level<const N: usize>(
    (old, new): (&Source<'_>, &Source<'_>),
    names: [&str; N],
    n: usize,
    mut work: impl FnMut(usize, [ndarray::Array2<f64>; N], [ndarray::Array2<f64>; N]) -> Option<()>,
) -> Option<()> {
    type Level<const N: usize> = Option<([ndarray::Array2<f64>; N], [ndarray::Array2<f64>; N])>;
    let read = |k: usize| -> Level<N> {
        let o: Vec<_> = names
            .iter()
            .map(|m| old.level(m, k))
            .collect::<Option<_>>()?;
        let w: Vec<_> = names
            .iter()
            .map(|m| new.level(m, k))
            .collect::<Option<_>>()?;
        Some((o.try_into().ok()?, w.try_into().ok()?))
    };
    std::thread::scope(|scope| {
        let (tx, rx) = std::sync::mpsc::sync_channel::<Level<N>>(1);
        scope.spawn(move || {
            for k in 0..n {
                // The receiver gone (the work stopped): stop reading.
                if tx.send(read(k)).is_err() {
                    break;
                }
            }
        });
        for k in 0..n {
            let (o, w) = rx.recv().ok()??;
            work(k, o, w)?;
        }
        Some(())
    })
}

/// The column budget of each isentropic layer along the layer-mean wind's trajectories,
/// read and traced one layer at a time. Returns the products and the points whose
/// trajectory did not converge.
fn layer_budget(
    g: &Geometry<'_>,
    (old, new): (&Source<'_>, &Source<'_>),
    dt_h: f64,
) -> Option<(Vec<Product>, usize)> {
    use crate::diagnostics::budget::{
        at_departure, departure_points, layer_absolute_vorticity, ColumnBudget, Status,
    };
    let names = ["layer_u", "layer_v", "layer_pv", "layer_dp"];
    let (nl, both, ny, nx) = budget_levels((old, new), &names)?;
    // pred, dep, stretch part, beta part, actual, diff, fractional stretch, flag
    let mut out: Vec<Array3<f32>> = (0..8)
        .map(|_| Array3::from_elem((nl, ny, nx), f32::NAN))
        .collect();
    let mut not_converged = 0;
    level_by_level(
        (old, new),
        names,
        both,
        |l, [uo, vo, pvo, dpo], [un, vn, pvn, dpn]| {
            if [uo.dim(), un.dim()] != [(ny, nx); 2] {
                return None;
            }
            // Layer-mean winds are written along the grid's axes.
            let d = departure_points(
                &g.layout,
                (uo.view(), vo.view()),
                (un.view(), vn.view()),
                dt_h * 3600.0,
                &g.trajectories,
            );
            not_converged += d.not_converged();
            let eta_old = layer_absolute_vorticity(pvo.view(), dpo.view());
            let eta_d = at_departure(eta_old.view(), &d, g.periodic);
            let dp_d = at_departure(dpo.view(), &d, g.periodic);
            let f_d = at_departure(g.f.view(), &d, g.periodic);
            for ((j, i), st) in d.status.indexed_iter() {
                out[7][(l, j, i)] = flag(*st);
                if *st != Status::Converged {
                    continue;
                }
                let b = ColumnBudget::of(
                    eta_d[(j, i)],
                    f_d[(j, i)],
                    g.f[(j, i)],
                    dp_d[(j, i)],
                    dpn[(j, i)],
                    pvn[(j, i)],
                );
                let values = [
                    b.parts.predicted(),
                    b.parts.zeta_departure,
                    b.parts.stretching,
                    b.parts.coriolis,
                    b.actual,
                    b.residual,
                    b.stretch,
                ];
                for (k, x) in values.into_iter().enumerate() {
                    out[k][(l, j, i)] = x as f32;
                }
            }
            Some(())
        },
    )?;
    let specs = [
        budget::ZETA_PRED,
        budget::ZETA_DEP,
        budget::ZETA_STRETCH,
        budget::ZETA_BETA,
        budget::ZETA,
        budget::ZETA_DIFF,
        budget::STRETCH,
        budget::UNCONVERGED,
    ];
    let notes = budget_notes(g, dt_h);
    let prods = specs
        .into_iter()
        .zip(out)
        .map(|(spec, data)| {
            let mut p = Product::new(spec, Vertical::ThetaLayer, data);
            p.numbers.extend(notes.iter().cloned());
            if spec.name == budget::UNCONVERGED.name {
                p.numbers.push((NOT_CONVERGED_ATTR, not_converged as f64));
            }
            p
        })
        .collect();
    Some((prods, not_converged))
}

/// The Lagrangian rate of change of PV on each isentropic surface along the
/// surface wind's trajectories, read and traced one surface at a time. Returns
/// the products and the points whose trajectory did not converge.
fn surface_budget(
    g: &Geometry<'_>,
    (old, new): (&Source<'_>, &Source<'_>),
    dt_h: f64,
) -> Option<(Vec<Product>, usize)> {
    use crate::diagnostics::budget::{at_departure, departure_points, lagrangian_rate, Status};
    let names = ["isen_u", "isen_v", "isen_pv"];
    let (ns, both, ny, nx) = budget_levels((old, new), &names)?;
    let mut rate = Array3::from_elem((ns, ny, nx), f32::NAN);
    let mut flags = rate.clone();
    let mut not_converged = 0;
    level_by_level(
        (old, new),
        names,
        both,
        |s, [uo, vo, pvo], [un, vn, pvn]| {
            if [uo.dim(), un.dim()] != [(ny, nx); 2] {
                return None;
            }
            let old_w = to_grid(g, &uo, &vo);
            let new_w = to_grid(g, &un, &vn);
            let d = departure_points(
                &g.layout,
                (old_w.0.view(), old_w.1.view()),
                (new_w.0.view(), new_w.1.view()),
                dt_h * 3600.0,
                &g.trajectories,
            );
            not_converged += d.not_converged();
            let pv_d = at_departure(pvo.view(), &d, g.periodic);
            for ((j, i), st) in d.status.indexed_iter() {
                flags[(s, j, i)] = flag(*st);
                if *st == Status::Converged {
                    // PV is read in K m2 kg-1 s-1: the rate is per second.
                    rate[(s, j, i)] =
                        lagrangian_rate(pvn[(j, i)], pv_d[(j, i)], dt_h * 3600.0) as f32;
                }
            }
            Some(())
        },
    )?;
    let notes = budget_notes(g, dt_h);
    let mut p = Product::new(budget::DPVDT, Vertical::Theta, rate);
    p.numbers.extend(notes.iter().cloned());
    let mut q = Product::new(budget::DPVDT_UNCONVERGED, Vertical::Theta, flags);
    q.numbers.extend(notes);
    q.numbers.push((NOT_CONVERGED_ATTR, not_converged as f64));
    Some((vec![p, q], not_converged))
}

/// The PV budget of the later step `new` against the earlier `old`, `dt_h`
/// hours apart. Points whose trajectories did not converge are flagged, left
/// missing, counted in the flag variables' attribute and logged.
pub fn pv_budget(g: &Geometry<'_>, old: &Source<'_>, new: &Source<'_>, dt_h: f64) -> Vec<Product> {
    let mut out = Vec::new();
    let mut not_converged = 0;
    for part in [
        layer_budget(g, (old, new), dt_h),
        surface_budget(g, (old, new), dt_h),
    ]
    .into_iter()
    .flatten()
    {
        out.extend(part.0);
        not_converged += part.1;
    }
    let file = new.path().display();
    if not_converged > 0 {
        warn!(file = %file, hours = dt_h, not_converged, "PV budget: trajectories that did not converge are left out");
    } else if !out.is_empty() {
        info!(file = %file, hours = dt_h, not_converged, "PV budget");
    }
    out
}

/// The published steps of this step's cycle.
fn same_cycle(run: &Run<'_>) -> Vec<Published> {
    published_where(
        run.out_dir,
        run.centre,
        run.grid_id,
        run.member,
        run.reference_time,
        |r, _| r == run.reference_time,
    )
}

/// Before this step is written: its budget against the previous step of the
/// cycle already published, if it is within `max_interval_h` hours, from the
/// step's own products (`this`) and the earlier file. Empty where there is none.
pub fn budget_from_previous(
    run: &Run<'_>,
    this: &Source<'_>,
    g: &Geometry<'_>,
    max_interval_h: u32,
) -> Vec<Product> {
    let files = same_cycle(run);
    let max = TimeDelta::try_hours(i64::from(max_interval_h)).unwrap_or_default();
    let prev = files
        .iter()
        .filter(|p| p.valid_time < run.valid_time)
        .max_by_key(|p| p.valid_time);
    match prev {
        Some(prev) if run.valid_time - prev.valid_time <= max => {
            let dt = run.valid_time - prev.valid_time;
            Source::file(&prev.path).map_or_else(Vec::new, |old| {
                pv_budget(g, &old, this, dt.num_seconds() as f64 / 3600.0)
            })
        }
        _ => Vec::new(),
    }
}

/// After this step is published: the budget of the next step of the cycle,
/// published before it (steps arrive in any order), against this one, added
/// to the next step's file. Returns the file updated.
pub fn update_next_budget(
    run: &Run<'_>,
    this_file: &Path,
    g: &Geometry<'_>,
    max_interval_h: u32,
    deflate: i32,
    kept: &KeptBits,
) -> Vec<PathBuf> {
    let files = same_cycle(run);
    let max = TimeDelta::try_hours(i64::from(max_interval_h)).unwrap_or_default();
    let next = files
        .iter()
        .filter(|p| p.valid_time > run.valid_time)
        .min_by_key(|p| p.valid_time);
    let Some(next) = next.filter(|n| n.valid_time - run.valid_time <= max) else {
        return Vec::new();
    };
    let dt = next.valid_time - run.valid_time;
    let prods = match (Source::file(this_file), Source::file(&next.path)) {
        (Some(old), Some(new)) => pv_budget(g, &old, &new, dt.num_seconds() as f64 / 3600.0),
        _ => return Vec::new(),
    };
    update(run, &next.path, prods, deflate, kept)
        .into_iter()
        .collect()
}
