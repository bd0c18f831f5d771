//! The settings of the configuration file's tables as plain structs with
//! their defaults: what the lower modules (the products, the output, the
//! service's feed rules) take. Validation that needs those modules lives in
//! [`super`], the file format's top, so that nothing here reaches up.

use serde::{Deserialize, Serialize};

/// Quicklook images (PNG) beside each product file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Quicklooks {
    /// Write them.
    pub enabled: bool,
    /// Images, each `variable` or `variable@level`: the level in the variable's
    /// vertical coordinate (hPa, K, PVU), `bottom-top` for a layer.
    pub images: Vec<String>,
    /// What outlines the land: Natural Earth coastlines and borders, the
    /// model's terrain height, or nothing.
    pub outline: OutlineKind,
    /// Heights of the terrain outline, m (for `outline = "terrain"`).
    pub terrain_m: Vec<f64>,
    /// The PV of the line drawn on PV and tropopause maps, PVU.
    pub contour_pvu: f64,
    /// The isentrope whose PV gives that line on tropopause maps, K.
    pub contour_theta_k: f64,
    /// Colour scales replacing the products' fixed defaults, by `variable` or
    /// `variable@level`: `[min, max]` or `[min, max, band width]`, in the
    /// units the image shows (hPa, PVU, 10^-5 s-1, ...).
    pub scales: std::collections::BTreeMap<String, Vec<f64>>,
}

/// What outlines the land on the quicklooks.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum OutlineKind {
    /// Natural Earth coastlines and country borders, on the grid's projection.
    Coastlines,
    /// Contours of the model's terrain height (an invented world's own outline).
    Terrain,
    /// No outline.
    None,
}

impl Default for Quicklooks {
    fn default() -> Self {
        Quicklooks {
            enabled: false,
            images: vec![
                "trop_p@2".into(),
                "isen_pv@320".into(),
                "eta@500".into(),
                "thick@1000-500".into(),
                "thick_chg_06h@1000-500".into(),
                "trop_fold_dp@2".into(),
            ],
            outline: OutlineKind::Coastlines,
            terrain_m: vec![250.0, 1000.0, 2000.0],
            contour_pvu: 2.0,
            contour_theta_k: 320.0,
            scales: std::collections::BTreeMap::new(),
        }
    }
}

/// Settings of the changes in time.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Changes {
    /// Intervals of the thickness change within a cycle, hours.
    pub intervals_h: Vec<u32>,
    /// Longest interval between consecutive steps for which the PV budget is made, hours.
    pub budget_max_interval_h: u32,
    /// Longest sub-step of the budget's trajectories, hours: longer intervals are cut.
    pub budget_max_substep_h: f64,
    /// A trajectory sub-step has converged when two successive departure points lie
    /// within this fraction of the grid length of each other.
    pub budget_tolerance: f64,
}

impl Default for Changes {
    fn default() -> Self {
        Changes {
            intervals_h: vec![6, 12, 24],
            budget_max_interval_h: 12,
            budget_max_substep_h: 3.0,
            budget_tolerance: 0.01,
        }
    }
}

/// Layer thickness settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Thickness {
    /// Isobaric layers [bottom, top] in hPa.
    pub layers_hpa: Vec<[f64; 2]>,
}

impl Default for Thickness {
    fn default() -> Self {
        Thickness {
            // In order of their middle pressure, from the ground up (see `Config::from_toml`).
            layers_hpa: vec![
                [1000.0, 850.0],
                [850.0, 700.0],
                [1000.0, 500.0],
                [700.0, 500.0],
            ],
        }
    }
}

/// Isentropic analysis settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Isentropic {
    /// Potential temperatures of the isentropic surfaces, K, ascending.
    pub surfaces: Vec<f64>,
    /// Isentropic layers [bottom, top] for layer PV, K.
    pub layers: Vec<[f64; 2]>,
    /// |PV| values of the dynamic tropopause surfaces, PVU, ascending (+ north, - south).
    pub tropopause_pvu: Vec<f64>,
    /// Potential temperature at and above which air counts as stratospheric whatever its
    /// PV, K: the tropopause is the lower of the PV surface and this isentrope.
    pub tropopause_theta_bound: f64,
    /// Crossings of the PV surface below this pressure (hPa) do not count toward a fold.
    pub fold_bottom_hpa: f64,
}

impl Default for Isentropic {
    fn default() -> Self {
        Isentropic {
            // 280 to 360 K every 5 K: the troposphere and lower stratosphere of mid-latitudes
            // in all seasons, 315-330 K for the tropopause break (common practice).
            surfaces: (0..=16).map(|k| 280.0 + 5.0 * f64::from(k)).collect(),
            layers: vec![[290.0, 300.0], [300.0, 310.0], [310.0, 330.0]],
            tropopause_pvu: vec![2.0],
            // The 380 K bound of the tropical tropopause (Hoskins, McIntyre and Robertson 1985).
            tropopause_theta_bound: 380.0,
            fold_bottom_hpa: 700.0,
        }
    }
}

/// Product switches.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Products {
    /// Relative and absolute vorticity on isobaric levels (`zeta`, `eta`).
    pub vorticity: bool,
    /// Horizontal divergence on isobaric levels (`div`); off unless asked for.
    pub divergence: bool,
    /// Potential temperature, -dtheta/dp and N^2 on isobaric levels (`theta`, `stab`, `n2`).
    pub stability: bool,
    /// Mask isobaric levels below the ground where surface pressure or orography is in the input.
    pub mask_below_ground: bool,
    /// Ertel PV on isobaric levels, full form (`pv`).
    pub isobaric_pv: bool,
    /// Pressure, height, temperature, winds, Montgomery streamfunction and PV on isentropic surfaces (`isen_*`).
    pub isentropic: bool,
    /// The dynamic tropopause on the configured PV surfaces (`trop_*`).
    pub tropopause: bool,
    /// Layer PV in column-depth form for the configured isentropic layers (`layer_pv`, `layer_dp`).
    pub layer_pv: bool,
    /// Thickness of the configured isobaric layers (`thick`).
    pub thickness: bool,
    /// Thickness change since the step `changes.intervals_h` earlier in the same cycle (`thick_chg_NNh`).
    pub thickness_change: bool,
    /// This cycle minus the previous cycle at the same valid time (`thick_r2r`, `z_r2r`, `trop_p_r2r`).
    pub run_to_run: bool,
    /// PV budget along isentropic trajectories between consecutive steps (`bud_*`).
    pub pv_budget: bool,
    /// Mean sea-level pressure (`mslp`, from the input or reduced from the 1000 hPa
    /// height), its changes (`mslp_chg_NNh`, `mslp_r2r`) and the terrain (`orog`).
    pub mslp: bool,
    /// Maximum Eady growth rate of the layer `cyclones.eady_layer_hpa` (`eady`).
    pub eady: bool,
    /// Equivalent potential temperature on isobaric levels (`theta_e`), where the input has humidity.
    pub theta_e: bool,
    /// Specific and relative humidity on isentropic surfaces (`isen_q`, `isen_rh`), where the input has humidity.
    pub isentropic_humidity: bool,
    /// Mass-weighted mean isobaric PV of the layer `cyclones.low_pv_layer_hpa` (`low_pv`).
    pub low_level_pv: bool,
    /// Cyclone centres tracked through the cycle, with what the diagnostics say
    /// around each (`*_cyclones.nc`, `*_cyclones.geojson`); needs `mslp`.
    pub cyclones: bool,
}

impl Products {
    /// True if at least one product that makes a file is switched on (the
    /// changes in time and the budget only add to those).
    pub fn any(&self) -> bool {
        self.vorticity
            || self.divergence
            || self.stability
            || self.isobaric_pv
            || self.isentropic
            || self.tropopause
            || self.layer_pv
            || self.thickness
    }
}

impl Default for Products {
    fn default() -> Self {
        Products {
            vorticity: true,
            divergence: false,
            stability: true,
            mask_below_ground: true,
            isobaric_pv: true,
            isentropic: true,
            tropopause: true,
            layer_pv: true,
            thickness: true,
            thickness_change: true,
            run_to_run: true,
            pv_budget: true,
            mslp: true,
            eady: true,
            theta_e: true,
            isentropic_humidity: true,
            low_level_pv: true,
            cyclones: true,
        }
    }
}

/// Cyclone centres and tracks, and the layers of the fields they draw on.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Cyclones {
    /// Isobaric layer [bottom, top] of the Eady growth rate, hPa.
    pub eady_layer_hpa: [f64; 2],
    /// Isobaric layer [bottom, top] of the low-level PV mean, hPa.
    pub low_pv_layer_hpa: [f64; 2],
    /// Highest isobaric level of `theta_e`, hPa (0: every level); above it the
    /// variable is missing.
    pub theta_e_top_hpa: f64,
    /// Isobaric layer [bottom, top] whose pressure-weighted mean wind steers the
    /// tracks' first guess, hPa.
    pub steering_layer_hpa: [f64; 2],
    /// Interval of the isobars that must close round a centre, hPa.
    pub contour_interval_hpa: f64,
    /// Farthest a closed isobar may reach from its centre, km.
    pub max_contour_radius_km: f64,
    /// Radius round each centre within which the diagnostics are summarised, km.
    pub radius_km: f64,
    /// Farthest a centre may lie from its first guess, km, for steps 6 h apart
    /// (in proportion for longer intervals).
    pub search_radius_km: f64,
}

impl Default for Cyclones {
    fn default() -> Self {
        Cyclones {
            eady_layer_hpa: [850.0, 500.0],
            low_pv_layer_hpa: [900.0, 700.0],
            theta_e_top_hpa: 100.0,
            steering_layer_hpa: [850.0, 500.0],
            contour_interval_hpa: 0.5,
            max_contour_radius_km: 2500.0,
            radius_km: 500.0,
            search_radius_km: 600.0,
        }
    }
}

/// Output settings.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct Output {
    /// zlib deflate level for data variables, 0 (none) to 9; shuffle is always on when > 0.
    pub deflate_level: i32,
    /// Mantissa bits kept in every data value, 1 to 23 (23: exact float32),
    /// if set; unset, each product keeps the bits measured to hold 99 % of its
    /// real information ([`crate::output::precision`]). Fewer bits compress
    /// better and faster; 16 keeps a relative precision of 7.6e-6.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub significant_bits: Option<u32>,
    /// Range of the longitudes in the files: `"auto"`, `"-180..180"` or
    /// `"0..360"`. A global grid is rolled into it; a limited area keeps its
    /// columns in order and takes the range in which its longitudes run without
    /// a jump. `"auto"` keeps a global grid in the range its first column is
    /// nearest to (0 or 180 W: no roll for the usual layouts).
    pub longitudes: crate::geometry::LongitudeRange,
    /// Names of originating centres for the files' `institution`, by their
    /// number in WMO common code table C-11 (a centre leeward does not name,
    /// or a local model whose files say 255, "missing"); for example
    /// `[output.institutions]` `255 = "Our local model"`.
    pub institutions: std::collections::BTreeMap<String, String>,
    /// Mantissa bits kept by single products, by product name (`thick`, `pv`,
    /// `thick_chg` for every thickness change), 1 to 23; wins over
    /// `significant_bits` and over the measured table. (A table: after the
    /// plain values, as TOML writes them.)
    pub kept_bits: std::collections::BTreeMap<String, u32>,
}

impl Default for Output {
    fn default() -> Self {
        Output {
            deflate_level: 1,
            significant_bits: None,
            longitudes: crate::geometry::LongitudeRange::Auto,
            institutions: std::collections::BTreeMap::new(),
            kept_bits: std::collections::BTreeMap::new(),
        }
    }
}

impl Cyclones {
    /// Every problem with the values, as "key: reason".
    pub fn problems(&self) -> Vec<String> {
        let mut p = Vec::new();
        for (key, l) in [
            ("cyclones.eady_layer_hpa", self.eady_layer_hpa),
            ("cyclones.low_pv_layer_hpa", self.low_pv_layer_hpa),
            ("cyclones.steering_layer_hpa", self.steering_layer_hpa),
        ] {
            if !(l[0] > l[1] && l[1] > 0.0 && l[0] <= 1100.0) {
                p.push(format!(
                    "{key}: [{}, {}] must be [bottom, top] in hPa with bottom > top > 0, bottom at most 1100",
                    l[0], l[1]
                ));
            }
        }
        if !(self.theta_e_top_hpa >= 0.0 && self.theta_e_top_hpa <= 1100.0) {
            p.push(format!(
                "cyclones.theta_e_top_hpa: {} is outside 0 to 1100 hPa",
                self.theta_e_top_hpa
            ));
        }
        if !(self.contour_interval_hpa >= 0.1 && self.contour_interval_hpa <= 10.0) {
            p.push(format!(
                "cyclones.contour_interval_hpa: {} is outside 0.1 to 10 hPa",
                self.contour_interval_hpa
            ));
        }
        for (key, v, lo, hi) in [
            (
                "cyclones.max_contour_radius_km",
                self.max_contour_radius_km,
                100.0,
                10_000.0,
            ),
            ("cyclones.radius_km", self.radius_km, 50.0, 3000.0),
            (
                "cyclones.search_radius_km",
                self.search_radius_km,
                50.0,
                3000.0,
            ),
        ] {
            if !(v >= lo && v <= hi) {
                p.push(format!("{key}: {v} km is outside {lo} to {hi} km"));
            }
        }
        p
    }
}
