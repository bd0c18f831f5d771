//! A step's products: the step driver and one module per product family.
//!
//! In: one [`Step`] (its fields, located in the inputs), the inputs' bytes, the
//! configuration and a [`Destination`]. Out: the step's NetCDF file, the changes it adds
//! to files published before, its images, and a [`StepReport`]. Stages, each a module:
//!
//! - `inputs`: the step's fields sorted by quantity and level, decoded;
//! - `needs`: which families the input allows and which fields they need;
//! - `columns`: the quantities stacked on the product levels, masked below the ground;
//! - `winds`: the winds along the grid's axes;
//! - the families: `vorticity`, `isobaric_pv`, `tropopause`, `isentropic`,
//!   `layer_pv`, `thickness` and `synoptic` (the fields round a cyclone), each
//!   product packed by `seal` as soon as it is made;
//! - `publish`: the changes in time, the file, the budgets, the tracks, the images and
//!   the caller's hook, under the caller's lock.
//!
//! The formulas themselves are the pure functions of [`crate::diagnostics`].

use crate::outcome::StepOutcome;
use std::borrow::Cow;
use std::path::Path;
use std::time::Instant;

use ndarray::{Array2, Array3};

use crate::config::Config;
use crate::diagnostics::constants::G0;
use crate::diagnostics::horizontal::Plane;
use crate::diagnostics::stability;
use crate::geometry::{Grid, Horizontal};
use crate::ingest::grid::{parse_grid, Scan};
use crate::ingest::params::Quantity;
use crate::output::cf::{Product, Vertical};
use crate::output::variables;
use crate::pipeline::{describe, InputFile, Issue, Step, StepReport};

mod columns;
mod divergence;
mod inputs;
mod isentropic;
mod isobaric_pv;
mod layer_pv;
mod needs;
mod publish;
mod seal;
mod synoptic;
mod thickness;
mod tropopause;
mod vorticity;
mod winds;

use columns::Columns;
use inputs::{decode_all, inventory, nothing_usable, pa_key, Decoded, Inventory};
use needs::{Needs, Want};
use seal::Sealer;
use winds::Winds;

/// Where a step's products go.
#[derive(Clone, Copy)]
pub struct Destination<'a> {
    /// Directory whose published files (and cycle subdirectories) are the
    /// memory across steps and cycles: changes in time are looked up there.
    pub store: &'a Path,
    /// Directory the step file is written into (`store` itself or below it).
    pub dir: &'a Path,
    /// A batch job's staging directory: the step's file and images are
    /// written there instead of `dir`, and additions to files already
    /// published go to staged copies there (see [`crate::changes::Run::staged`]);
    /// the service moves them into place. Nothing published is touched.
    pub stage: Option<&'a Path>,
}

impl<'a> Destination<'a> {
    /// Everything in one directory, one step at a time (`leeward process`).
    pub fn flat(dir: &'a Path) -> Self {
        Destination {
            store: dir,
            dir,
            stage: None,
        }
    }
}

/// Run one step of `inputs` and write its products to `out`.
pub fn run_step(
    step: &Step,
    inputs: &[InputFile],
    cfg: &Config,
    out: &Destination<'_>,
    grid_suffix: Option<usize>,
) -> StepReport {
    let t0 = Instant::now();
    let cycle = step
        .key
        .reference_time
        .format("%Y-%m-%dT%H:%MZ")
        .to_string();
    let lead = step.lead_hours();
    let mut rep = StepReport {
        cycle: cycle.clone(),
        lead_hours: lead,
        ..Default::default()
    };
    let Some((grid, scan)) = grid_of(step, inputs, cfg, &mut rep) else {
        rep.seconds = t0.elapsed().as_secs_f64();
        return rep;
    };
    rep.grid = grid.describe();
    let mut issues = Vec::new();
    let inv = inventory(step, inputs, &mut issues);
    let needs = match Needs::work_out(&inv, cfg, &mut rep.missing) {
        Ok(n) => n,
        Err(lacking) => {
            issues.extend(nothing_usable(step, inputs, &lacking, &cycle, lead));
            rep.issues = issues;
            rep.outcome = StepOutcome::InputFailed {
                reason: format!(
                    "no fields for any product: {lacking} ({})",
                    rep.missing.join("; ")
                ),
            };
            rep.seconds = t0.elapsed().as_secs_f64();
            return rep;
        }
    };
    // Decode what the products need, in parallel across fields.
    let t_decode = Instant::now();
    let wanted = needs.wanted(&inv, cfg.products.mask_below_ground);
    let mut dec = decode_all(wanted, inputs, &scan, &mut issues);
    for p in &inv.geopotential {
        if let Some(z) = dec.get_mut(&Want::Iso(Quantity::GeopotentialHeight, *p)) {
            z.mapv_inplace(|phi| (f64::from(phi) / G0) as f32);
        }
    }
    let terrain_m: Option<Array2<f32>> = needs
        .terrain_outline
        .then(|| {
            let to_m = inv.orography.as_ref().map_or(1.0, |o| o.1) as f32;
            dec.get(&Want::Orography).map(|o| o.mapv(|x| x * to_m))
        })
        .flatten();
    rep.fields_used = dec.len();
    rep.decode_seconds = t_decode.elapsed().as_secs_f64();
    let t_compute = Instant::now();
    // Mean sea-level pressure and the terrain, before anything is masked below ground.
    let surface = sea_level(&needs, &inv, &mut dec, &mut rep.missing);
    let mut cols = Columns::stack(dec, &needs, &inv, grid.shape());
    let (lat, lon) = grid.latlon();
    // Longitudes of every point of a rotated or projected grid in one range, as the columns'.
    let lon = if matches!(grid.horizontal, Horizontal::LatLon { .. }) {
        lon
    } else {
        crate::geometry::longitude::points(&lon, cfg.output.longitudes)
    };
    let plane = Plane::new(&grid, &lat, &lon);
    let winds = Winds::read(&grid, &plane, &inv, &needs.wind_levels, &cols);
    let seal = Sealer::new(&cfg.output);
    rep.family_seconds
        .push(("prepare", t_compute.elapsed().as_secs_f64()));
    let cx = Context {
        cfg,
        needs: &needs,
        inv: &inv,
        plane: &plane,
        winds: &winds,
        seal: &seal,
        lat: &lat,
        cycle: &cycle,
        lead,
    };
    let t = cols.t.take();
    let iso = isobaric(&cx, &cols, t, surface, &mut rep);
    let (fields, p_layers) = aloft(&cx, &cols, iso, &mut rep);
    let publishing = publish::Publishing {
        step,
        inputs,
        cfg,
        out,
        grid_suffix,
        seal: &seal,
        f: plane.f.clone(),
        rotation: plane.rotation.clone(),
        winds_grid_relative: winds.input_grid_relative,
    };
    drop(plane);
    let made = publish::Made {
        fields,
        p_layers,
        grid,
        lat,
        lon,
        cols,
        winds,
        budget_layer: needs.layer,
        terrain_m,
        t_compute,
    };
    publish::finish(&publishing, made, rep, issues, t0)
}

/// The step's grid and scanning, or None (the step skipped and each file said) when
/// the grid cannot be used.
fn grid_of(
    step: &Step,
    inputs: &[InputFile],
    cfg: &Config,
    rep: &mut StepReport,
) -> Option<(Grid, Scan)> {
    let Some(first) = step.fields.first() else {
        rep.outcome = StepOutcome::InputFailed {
            reason: "no fields".into(),
        };
        return None;
    };
    match parse_grid(&first.entry.grid_definition).map_err(|e| e.to_string()) {
        Ok((g, s)) => Some(crate::ingest::grid::with_longitudes(
            g,
            s,
            cfg.output.longitudes,
        )),
        Err(reason) => {
            // Every field of the step shares this grid: report each file once.
            let mut seen = Vec::new();
            for fr in &step.fields {
                if !seen.contains(&fr.file) {
                    seen.push(fr.file);
                    rep.issues.push(Issue {
                        file: inputs[fr.file].path.clone(),
                        field: Some(fr.entry.index),
                        what: describe(&fr.entry),
                        reason: reason.clone(),
                    });
                }
            }
            tracing::warn!(cycle = %rep.cycle, step = rep.lead_hours, %reason, "grid refused");
            rep.outcome = StepOutcome::InputFailed { reason };
            None
        }
    }
}

/// Mean sea-level pressure (the input's, or reduced from the 1000 hPa height) and the
/// terrain with it, when asked for.
fn sea_level(
    needs: &Needs,
    inv: &Inventory,
    dec: &mut Decoded<Want>,
    missing: &mut Vec<String>,
) -> Vec<Product> {
    let mut surface = Vec::new();
    if !needs.mslp {
        return surface;
    }
    let input = dec.remove(&Want::Mslp);
    let iso = |q| dec.get(&Want::Iso(q, pa_key(1.0e5)));
    let z1000 = iso(Quantity::GeopotentialHeight).filter(|_| needs.mslp_from_z);
    let t1000 = iso(Quantity::Temperature).filter(|_| needs.mslp_from_z);
    let made = synoptic::mslp(input, z1000, t1000);
    if made.is_none() {
        missing.push("mean sea-level pressure, or the 1000 hPa height: no mslp".into());
    }
    surface.extend(made);
    if let (Some(oro), Some((_, scale))) = (dec.get(&Want::Orography), &inv.orography) {
        surface.push(synoptic::orography(oro, *scale));
    }
    surface
}

/// What every family of a step reads.
struct Context<'a> {
    cfg: &'a Config,
    needs: &'a Needs,
    inv: &'a Inventory,
    plane: &'a Plane<'a>,
    winds: &'a Winds,
    seal: &'a Sealer<'a>,
    lat: &'a Array2<f64>,
    cycle: &'a str,
    lead: i64,
}

/// Seconds per family, in [`StepReport::family_seconds`].
struct Laps(Instant);

impl Laps {
    fn lap(&mut self, rep: &mut StepReport, family: &'static str) {
        rep.family_seconds
            .push((family, self.0.elapsed().as_secs_f64()));
        give_back_free_memory();
        self.0 = Instant::now();
    }
}

/// Hand the heap's free pages back to the kernel, between families and once
/// the file is written, so that each family (and the PV budget's trajectories
/// after writing) starts from what is still held, not from the high-water
/// mark of freed blocks that glibc keeps for reuse in every thread's arena.
/// At 0.25 degree it lowers the step's peak by about 150 MiB and the later
/// step's by about 850 (docs/performance.md).
fn give_back_free_memory() {
    // SAFETY: malloc_trim(3) takes a byte count and no pointer, has no
    // precondition and takes each arena's lock itself, so calling it from any
    // thread at any moment cannot touch memory Rust owns or race with another
    // allocation.
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    unsafe {
        libc::malloc_trim(0);
    }
}

/// What the isobaric families leave for the families aloft and the file.
struct Isobaric<'c> {
    /// Products so far, in the file's order.
    fields: Vec<Product>,
    /// Single-level products, written after the isobaric ones.
    surface: Vec<Product>,
    /// Potential temperature on the levels, K.
    theta: Option<Array3<f32>>,
    /// Relative humidity on the levels, %.
    rh: Option<Cow<'c, Array3<f32>>>,
    /// Temperature, kept only when a thickness layer lacks heights.
    t: Option<Array3<f32>>,
    /// `stab`, `n2` and `pv`, written after the families aloft.
    later: Vec<Product>,
}

/// Vorticity, potential temperature and stability, the fields round a cyclone, isobaric
/// PV and the tropopause, family by family.
fn isobaric<'c>(
    cx: &Context<'_>,
    cols: &'c Columns,
    t: Option<Array3<f32>>,
    mut surface: Vec<Product>,
    rep: &mut StepReport,
) -> Isobaric<'c> {
    let (needs, seal, pr) = (cx.needs, cx.seal, &cx.cfg.products);
    let mut laps = Laps(Instant::now());
    let mut fields = Vec::new();
    let axes = cx.winds.along_axes(cols);
    // Isobaric vorticity, level by level in parallel.
    let eta = axes.map(|(ug, vg)| {
        let (zeta, eta) = vorticity::zeta_eta(cx.plane, ug, vg);
        if needs.vort {
            fields.push(seal.sealed(variables::ZETA, Vertical::Pressure, zeta));
            fields.push(seal.sealed_copy(variables::ETA, Vertical::Pressure, &eta));
        }
        if needs.div {
            let d = divergence::divergence(cx.plane, ug, vg);
            fields.push(seal.sealed(variables::DIV, Vertical::Pressure, d));
        }
        eta
    });
    laps.lap(rep, "vorticity");
    // Potential temperature and static stability.
    let mut st = t.as_ref().map(|t| stability::stability(t.view(), &cols.p));
    let rh = needs
        .moist
        .then(|| {
            synoptic::relative_humidity(cols.q.as_ref(), cols.rh.as_ref(), t.as_ref(), &cols.p)
        })
        .flatten();
    if needs.moist && rh.is_none() {
        rep.missing
            .push("isobaric humidity: no theta_e, isen_q or isen_rh".into());
    }
    let syn = synoptic::Stacks {
        p: &cols.p,
        t: t.as_ref(),
        u: axes.map(|a| a.0),
        v: axes.map(|a| a.1),
        z: cols.z.as_ref(),
        theta: st.as_ref().map(|s| &s.theta),
        rh: rh.as_deref(),
        f: &cx.plane.f,
        rotation: cx.plane.rotation.as_ref(),
    };
    if pr.theta_e {
        let top = cx.cfg.cyclones.theta_e_top_hpa;
        fields.extend(synoptic::theta_e(&syn, top, seal));
    }
    let both = needs.have_t && needs.have_w;
    synoptic::eady_and_steering(&syn, cx.cfg, both, &mut surface, &mut rep.missing);
    // Temperature itself is needed later only for a thickness layer without heights.
    let t = t.filter(|_| {
        thickness::needs_temperature(needs.thick, &needs.z_levels, &cx.cfg.thickness.layers_hpa)
    });
    let take = |st: &mut Option<stability::Stability>,
                which: fn(&mut stability::Stability) -> &mut Array3<f32>| {
        st.as_mut().map(|s| std::mem::take(which(s)))
    };
    let n2 = take(&mut st, |s| &mut s.n2).filter(|_| needs.stab);
    let mut later: Vec<Product> = Vec::new();
    let n2_prod = n2.map(|n2| seal.sealed(variables::N2, Vertical::Pressure, n2));
    laps.lap(rep, "stability");
    // Isobaric PV in its full form.
    let mut pv3 = None;
    if let (Some(st), Some(eta), Some((ug, vg))) = (&st, &eta, axes) {
        if needs.pv || needs.trop || needs.low_pv {
            let th = (&st.theta, &st.neg_dtheta_dp);
            pv3 = Some(isobaric_pv::isobaric_pv(
                cx.plane,
                eta,
                th,
                (ug, vg),
                &cols.p,
            ));
        }
    }
    // Absolute vorticity is needed by PV only.
    drop(eta);
    if let (true, Some(pv)) = (needs.low_pv, &pv3) {
        surface.push(synoptic::low_pv(
            pv,
            &cols.p,
            cx.cfg.cyclones.low_pv_layer_hpa,
        ));
    }
    let stab = take(&mut st, |s| &mut s.neg_dtheta_dp).filter(|_| needs.stab);
    later.extend(stab.map(|s| seal.sealed(variables::STAB, Vertical::Pressure, s)));
    later.extend(n2_prod);
    laps.lap(rep, "isobaric_pv");
    // Dynamic tropopause and folds on each PV surface.
    if let (true, Some(pv), Some(st), Some(u), Some(v)) = (needs.trop, &pv3, &st, &cols.u, &cols.v)
    {
        let columns = tropopause::TropopauseColumns {
            pv,
            theta: &st.theta,
            z: cols.z.as_ref(),
            u,
            v,
            lat: cx.lat,
            p: &cols.p,
        };
        let w = cx.winds;
        let winds = (
            variables::wind(
                "trop_u",
                w.u_spec,
                "wind component at the dynamic tropopause",
            ),
            variables::wind(
                "trop_v",
                w.v_spec,
                "wind component at the dynamic tropopause",
            ),
        );
        let made = tropopause::tropopause_products(&columns, &cx.cfg.isentropic, winds);
        fields.extend(made.into_iter().map(|p| seal.seal(p)));
    }
    let pv = pv3.filter(|_| needs.pv);
    later.extend(pv.map(|pv| seal.sealed(variables::PV, Vertical::Pressure, pv)));
    laps.lap(rep, "tropopause");
    Isobaric {
        fields,
        surface,
        theta: st.map(|s| s.theta),
        rh,
        t,
        later,
    }
}

/// The isentropic surfaces, the layer PV and the thickness, then every product in the
/// file's order with the thickness layers made (Pa).
fn aloft(
    cx: &Context<'_>,
    cols: &Columns,
    iso: Isobaric<'_>,
    rep: &mut StepReport,
) -> (Vec<Product>, Vec<[f64; 2]>) {
    let (needs, seal, pr) = (cx.needs, cx.seal, &cx.cfg.products);
    let Isobaric {
        mut fields,
        mut surface,
        theta,
        rh,
        t,
        later,
    } = iso;
    let mut laps = Laps(Instant::now());
    let axes = cx.winds.along_axes(cols);
    if let (true, Some(theta)) = (needs.isen, &theta) {
        let sources = isentropic::Sources {
            theta,
            p: &cols.p,
            targets: &cx.cfg.isentropic.surfaces,
            winds: match (&cols.u, &cols.v, axes) {
                (Some(u), Some(v), Some(g)) => Some(((u, v), g)),
                _ => None,
            },
            z: cols.z.as_ref(),
            rh: rh.as_deref().filter(|_| pr.isentropic_humidity),
            have_w: needs.have_w,
            cycle: cx.cycle,
            lead: cx.lead,
        };
        fields.extend(isentropic::products(&sources, cx.plane, cx.winds, seal));
    }
    laps.lap(rep, "isentropic");
    if let (true, Some(theta), Some(g)) = (needs.layer, &theta, axes) {
        let layers = &cx.cfg.isentropic.layers;
        fields.extend(layer_pv::products(
            theta, &cols.p, g, layers, cx.plane, seal,
        ));
    }
    laps.lap(rep, "layer_pv");
    // Isobaric layer thickness: heights where both levels have them, else hypsometric.
    let mut p_layers = Vec::new();
    if needs.thick {
        let layers = &cx.cfg.thickness.layers_hpa;
        let (prod, made) = thickness::product(cols, t.as_ref(), layers, &mut rep.missing);
        fields.extend(prod.map(|p| seal.seal(p)));
        p_layers = made;
    }
    laps.lap(rep, "thickness");
    if let (true, Some(theta)) = (needs.stab, theta) {
        fields.push(seal.sealed(variables::THETA, Vertical::Pressure, theta));
    }
    fields.extend(later);
    for p in &mut surface {
        seal::in_si_units(p);
    }
    fields.extend(surface);
    if let (true, Some(z)) = (needs.thick || needs.isen, &cols.z) {
        fields.push(heights(cx, z));
    }
    (fields, p_layers)
}

/// The isobaric heights, packed, saying which levels came from geopotential.
fn heights(cx: &Context<'_>, z: &Array3<f32>) -> Product {
    let mut prod = cx.seal.sealed_copy(variables::Z, Vertical::Pressure, z);
    if !cx.inv.geopotential.is_empty() {
        let hpa: Vec<String> = cx
            .inv
            .geopotential
            .iter()
            .map(|p| format!("{}", *p as f64 / 1e4))
            .collect();
        prod.notes.push((
            "leeward_method",
            format!(
                "geopotential (WMO 0/3/4) divided by standard gravity {G0} m s-2 at {} hPa",
                hpa.join(", ")
            ),
        ));
    }
    prod
}
