//! What a step can make and what it must decode for that.
//!
//! In: the step's [`Inventory`] and the product switches. Out: [`Needs`], which product
//! families the isobaric levels present allow, each missing input said in words, and
//! the list of fields to decode ([`Needs::wanted`]). Nothing is decoded here.

use crate::config::Config;
use crate::ingest::params::Quantity;
use crate::pipeline::FieldRef;

use super::inputs::{pa_key, Inventory};

/// A field a step decodes, by what it is.
#[derive(Clone, PartialEq, Eq, PartialOrd, Ord)]
pub(super) enum Want {
    /// A quantity on an isobaric level (Pa key of [`pa_key`]).
    Iso(Quantity, i64),
    SurfacePressure,
    Orography,
    Mslp,
}

/// The product families a step makes and the inputs they need.
pub(super) struct Needs {
    pub t_levels: Vec<i64>,
    pub u_levels: Vec<i64>,
    pub v_levels: Vec<i64>,
    /// Levels with both wind components.
    pub wind_levels: Vec<i64>,
    /// Levels with geopotential height (or geopotential).
    pub z_levels: Vec<i64>,
    pub have_t: bool,
    pub have_w: bool,
    pub vort: bool,
    pub div: bool,
    pub stab: bool,
    pub pv: bool,
    pub isen: bool,
    pub trop: bool,
    pub layer: bool,
    pub thick: bool,
    pub moist: bool,
    pub low_pv: bool,
    pub mslp: bool,
    /// Mean sea-level pressure reduced from the 1000 hPa height (none in the input).
    pub mslp_from_z: bool,
    pub need_t: bool,
    pub need_w: bool,
    pub need_z_products: bool,
    /// Below-ground levels found from orography and heights (no surface pressure).
    pub mask_by_orography: bool,
    /// The model's terrain outlines the quicklooks.
    pub terrain_outline: bool,
}

impl Needs {
    /// What `cfg` asks that `inv` allows; each input lacking is added to `missing`.
    /// `Err(what is lacking)` when no product at all can be made.
    pub fn work_out(
        inv: &Inventory,
        cfg: &Config,
        missing: &mut Vec<String>,
    ) -> Result<Self, String> {
        let levels_of = |q: Quantity| -> Vec<i64> {
            inv.isobaric
                .keys()
                .filter(|(qq, _)| *qq == q)
                .map(|(_, p)| *p)
                .collect()
        };
        let t_levels = levels_of(Quantity::Temperature);
        let u_levels = levels_of(Quantity::WindU);
        let v_levels = levels_of(Quantity::WindV);
        let wind_levels: Vec<i64> = u_levels
            .iter()
            .copied()
            .filter(|p| v_levels.contains(p))
            .collect();
        for p in u_levels.iter().filter(|p| !v_levels.contains(p)) {
            missing.push(format!("v at {} hPa (u present)", *p as f64 / 1e4));
        }
        for p in v_levels.iter().filter(|p| !u_levels.contains(p)) {
            missing.push(format!("u at {} hPa (v present)", *p as f64 / 1e4));
        }
        let pr = &cfg.products;
        let z_levels = levels_of(Quantity::GeopotentialHeight);
        let (have_t, have_w) = (!t_levels.is_empty(), !wind_levels.is_empty());
        let mslp = pr.mslp || pr.cyclones;
        let mut n = Needs {
            vort: pr.vorticity && have_w,
            div: pr.divergence && have_w,
            stab: pr.stability && have_t,
            pv: pr.isobaric_pv && have_t && have_w,
            isen: pr.isentropic && have_t,
            trop: pr.tropopause && have_t && have_w,
            layer: pr.layer_pv && have_t && have_w,
            thick: pr.thickness && (have_t || !z_levels.is_empty()),
            moist: (pr.theta_e || pr.isentropic_humidity) && have_t,
            low_pv: pr.low_level_pv && have_t && have_w,
            mslp,
            mslp_from_z: mslp && inv.mslp.is_none(),
            need_t: false,
            need_w: false,
            need_z_products: false,
            mask_by_orography: pr.mask_below_ground
                && inv.orography.is_some()
                && inv.surface_pressure.is_none(),
            terrain_outline: cfg.quicklook.enabled
                && cfg.quicklook.outline == crate::config::OutlineKind::Terrain,
            t_levels,
            u_levels,
            v_levels,
            wind_levels,
            z_levels,
            have_t,
            have_w,
        };
        if (pr.vorticity || pr.divergence || pr.isobaric_pv || pr.tropopause || pr.layer_pv)
            && !have_w
        {
            missing.push("isobaric u and v: no vorticity, divergence or PV".into());
        }
        if (pr.stability || pr.isentropic || pr.isobaric_pv || pr.tropopause || pr.layer_pv)
            && !have_t
        {
            missing.push(
                "isobaric temperature: no theta, stability, PV or isentropic products".into(),
            );
        }
        if !(n.vort || n.div || n.stab || n.pv || n.isen || n.trop || n.layer || n.thick) {
            return Err(n.lacking(cfg));
        }
        n.need_t = n.stab || n.pv || n.isen || n.trop || n.layer || n.thick;
        n.need_w = n.vort || n.div || n.pv || n.isen || n.trop || n.layer;
        n.need_z_products = n.isen || n.trop || n.thick;
        if n.need_z_products && n.z_levels.is_empty() {
            missing.push("isobaric geopotential height: no isen_z, isen_m, trop_z".into());
        }
        Ok(n)
    }

    /// Why no product can be made, in words: the isobaric quantities absent.
    fn lacking(&self, cfg: &Config) -> String {
        let mut absent = Vec::new();
        for (q, levels) in [
            ("temperature", &self.t_levels),
            ("u", &self.u_levels),
            ("v", &self.v_levels),
        ] {
            if levels.is_empty() {
                absent.push(q);
            }
        }
        if cfg.products.thickness && self.z_levels.is_empty() {
            absent.push("geopotential height");
        }
        if absent.is_empty() {
            "no isobaric level with both u and v".to_string()
        } else {
            format!("no isobaric {}", absent.join(", "))
        }
    }

    /// The fields to decode for these products, with where each is.
    pub fn wanted(&self, inv: &Inventory, mask_below_ground: bool) -> Vec<(Want, FieldRef)> {
        let at_1000 = |p: &i64| *p == pa_key(1.0e5);
        let mut wanted: Vec<(Want, FieldRef)> = Vec::new();
        for ((q, p), fr) in &inv.isobaric {
            let need = match q {
                Quantity::Temperature => self.need_t || (self.mslp_from_z && at_1000(p)),
                Quantity::WindU | Quantity::WindV => self.need_w && self.wind_levels.contains(p),
                Quantity::GeopotentialHeight => {
                    self.need_z_products
                        || self.mask_by_orography
                        || (self.mslp_from_z && at_1000(p))
                }
                Quantity::SpecificHumidity | Quantity::RelativeHumidity => self.thick || self.moist,
                _ => false,
            };
            if need {
                wanted.push((Want::Iso(*q, *p), fr.clone()));
            }
        }
        if mask_below_ground {
            if let Some(fr) = &inv.surface_pressure {
                wanted.push((Want::SurfacePressure, fr.clone()));
            } else if let Some((fr, _)) = &inv.orography {
                wanted.push((Want::Orography, fr.clone()));
            }
        }
        if self.mslp {
            if let Some(fr) = &inv.mslp {
                wanted.push((Want::Mslp, fr.clone()));
            }
        }
        // The model's own terrain outlines its land on the quicklooks when asked, and is
        // written with the mean sea-level pressure.
        if (self.terrain_outline || self.mslp) && !wanted.iter().any(|(w, _)| *w == Want::Orography)
        {
            if let Some((fr, _)) = &inv.orography {
                wanted.push((Want::Orography, fr.clone()));
            }
        }
        wanted
    }
}
