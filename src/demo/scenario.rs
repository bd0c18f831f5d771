//! The demo scenario: invented weather for two imaginary models, a regional one on
//! a Lambert conformal grid and a coarse global one on a 5-degree latitude/longitude
//! grid.
//!
//! In: a valid time (hours after 2026-03-14 00 UTC). Out: for every point of the
//! model's grid the terrain, the surface pressure and, on 21 isobaric levels,
//! temperature, specific humidity, geopotential height and winds.
//!
//! The weather is built from the temperature up. Temperature is an analytic
//! function of latitude, longitude, pressure and time: a baroclinic zone with a
//! tropopause, an upper trough (a southward meander of the zone with a cold core
//! below a lowered tropopause and a warm lower stratosphere), a cold dome over a
//! north-south mountain range, a warm lee trough east of it, and a warm patch
//! where heating goes on in the middle troposphere. Heights follow from the
//! hypsometric equation integrated upward from a 1000 hPa reference height,
//! surface pressure is where the isobaric height meets the terrain, and the
//! winds are geostrophic. Everything here is invented data for the demo.

use rayon::prelude::*;

use crate::diagnostics::constants::{G0, OMEGA, R_DRY};
use crate::diagnostics::thickness::{specific_humidity_from_rh, virtual_temperature};
use crate::geometry::{Conformal, Earth};

use super::encode::GridSpec;

/// Isobaric levels of the scenario, hPa (21 levels).
pub const LEVELS_HPA: [f64; 21] = [
    1000.0, 950.0, 900.0, 850.0, 800.0, 750.0, 700.0, 650.0, 600.0, 550.0, 500.0, 450.0, 400.0,
    350.0, 300.0, 250.0, 200.0, 150.0, 100.0, 70.0, 50.0,
];

/// The regional model's Lambert conformal grid: 30/60 N secant cone, LoV 10 E,
/// 97 x 81 points at 30 km.
pub const GRID: GridSpec = GridSpec::Lambert {
    nx: 97,
    ny: 81,
    lat1: 33.0,
    lon1: -14.0,
    dx: 30_000.0,
    dy: 30_000.0,
    lov: 10.0,
    latin1: 30.0,
    latin2: 60.0,
};

/// The global model's grid: 5 degrees, 72 x 37 points from the South Pole to the North Pole.
pub const GLOBAL_GRID: GridSpec = GridSpec::LatLon {
    ni: 72,
    nj: 37,
    lat0: -90.0,
    lon0: 0.0,
    dlat: 5.0,
    dlon: 5.0,
};

/// Radius of the scenario's spherical earth, m (the value written in section 3).
pub const EARTH_RADIUS: f64 = 6_371_229.0;

const DEG: f64 = std::f64::consts::PI / 180.0;
/// Centre latitude of the baroclinic zone, as sin^2(47 deg).
const ZONE_S0: f64 = 0.534_861_9;
/// Width of the smooth maximum joining troposphere and stratosphere, K.
const TROPOPAUSE_BLEND: f64 = 1.5;
/// Specific humidity of the stratosphere, kg/kg.
const Q_STRATOSPHERE: f64 = 3.5e-6;
/// Sub-intervals of Simpson's rule between two levels in the height integration.
const PANELS: usize = 4;

/// The upper-level wave of a scenario.
#[derive(Debug, Clone, Copy)]
enum Wave {
    /// One trough with a weaker ridge downstream, moving east.
    Trough {
        /// Longitude of the trough axis at `lat` at valid hour 0, degrees.
        lon0: f64,
        /// Latitude of the trough's cold core, degrees.
        lat: f64,
        /// Eastward speed at `lat`, m/s.
        speed: f64,
        /// e-folding half-length along x, km.
        length_km: f64,
        /// Tilt of the axis, degrees of longitude per degree of latitude (positive: north part ahead).
        tilt: f64,
    },
    /// A zonal wave in each hemisphere, moving east at `speed` along 47 degrees.
    Zonal {
        /// Zonal wavenumbers, northern and southern hemisphere.
        k_north: f64,
        k_south: f64,
        /// A trough axis at valid hour 0, degrees.
        lon0: f64,
        /// Eastward phase speed at 47 degrees, m/s.
        speed: f64,
        /// Relative amplitude in the southern hemisphere.
        south: f64,
    },
}

/// The mountain range and its lee.
#[derive(Debug, Clone, Copy)]
struct Range {
    /// Longitude of the crest line, degrees.
    lon: f64,
    /// Southern and northern end, degrees.
    lat_s: f64,
    lat_n: f64,
    /// Width of the tapering at the ends, degrees of latitude.
    taper: f64,
    /// Crest height, gpm.
    height: f64,
    /// e-folding half-width across the range, km.
    half_width_km: f64,
    /// Distance of the lee trough's warm core east of the crest, km, and its e-folding half-width.
    lee_offset_km: f64,
    lee_width_km: f64,
}

/// The patch of heating in the middle troposphere, carried by the 600-400 hPa wind.
#[derive(Debug, Clone, Copy)]
struct Heating {
    /// Centre at valid hour 0, degrees.
    lat0: f64,
    lon0: f64,
    /// e-folding radius, km.
    radius_km: f64,
    /// Temperature gained at 500 hPa by the end of the heating, K.
    gain: f64,
    /// Middle of the heating episode, valid hours, and its time scale, hours.
    t_mid: f64,
    t_scale: f64,
}

/// A low that forms in the lee of the range and deepens as it drifts away from it,
/// with heating round its centre in the lower troposphere.
#[derive(Debug, Clone, Copy)]
struct LeeLow {
    /// Centre at valid hour 0, degrees.
    lat0: f64,
    lon0: f64,
    /// Its drift toward east and north, m/s.
    u: f64,
    v: f64,
    /// Depth at 1000 hPa at hour 0, gpm, and what it gains over its deepening.
    depth0: f64,
    deepen: f64,
    /// Middle of the deepening, valid hours, and its time scale, hours.
    t_mid: f64,
    t_scale: f64,
    /// e-folding radius, km.
    radius_km: f64,
    /// Warming at 650 hPa round the centre by the end of the deepening, K.
    heat: f64,
}

/// One scenario: the shapes and amplitudes of its weather.
#[derive(Debug, Clone, Copy)]
struct Weather {
    /// Width of the baroclinic zone in sin^2(latitude) (0.15 is about 8.6 degrees at
    /// 47 N), and half its temperature contrast at 1000 hPa, K.
    zone_width: f64,
    zone_contrast: f64,
    wave: Wave,
    range: Range,
    heating: Heating,
    /// Southward shift of the baroclinic zone in the trough's axis, degrees, and
    /// the e-folding distance in latitude from 47 degrees over which it fades.
    meander: f64,
    meander_reach: f64,
    /// Cold core below the tropopause and warm lower stratosphere of the trough, K,
    /// centred on 50 degrees with an e-folding reach in latitude (degrees).
    core_reach: f64,
    cold: f64,
    warm: f64,
    /// Cold dome over the crest (lifted isentropes), K at 1000 hPa for the full crest height.
    dome: f64,
    /// Lee warm core, K: before and while the trough approaches.
    lee_base: f64,
    lee_boost: f64,
    /// How near the approaching trough must be to deepen the lee trough (km for a
    /// single trough, radians of wave phase for a zonal wave).
    lee_reach: f64,
    /// Surface low ahead of the trough: depth (gpm at 1000 hPa) and distance ahead
    /// (km for a single trough, degrees of longitude for a zonal wave).
    low: f64,
    low_ahead: f64,
    /// The low in the lee of the range.
    lee_low: LeeLow,
}

/// The regional scenario: a westerly jet over a range along 8 E, a trough coming
/// from the Atlantic side at 12 m/s, heating south-east of it.
const REGIONAL: Weather = Weather {
    zone_width: 0.15,
    zone_contrast: 10.0,
    wave: Wave::Trough {
        lon0: -21.0,
        lat: 50.0,
        speed: 12.0,
        length_km: 650.0,
        tilt: 0.4,
    },
    range: Range {
        lon: 8.0,
        lat_s: 41.5,
        lat_n: 53.0,
        taper: 1.5,
        height: 2200.0,
        half_width_km: 140.0,
        lee_offset_km: 300.0,
        lee_width_km: 220.0,
    },
    heating: Heating {
        lat0: 35.0,
        lon0: -13.0,
        radius_km: 450.0,
        gain: 3.0,
        t_mid: 24.0,
        t_scale: 12.0,
    },
    meander: 4.0,
    meander_reach: 11.0,
    core_reach: 8.0,
    cold: 2.0,
    warm: 2.0,
    dome: 3.0,
    lee_base: 1.0,
    lee_boost: 3.5,
    lee_reach: 1300.0,
    low: 40.0,
    low_ahead: 900.0,
    lee_low: LeeLow {
        lat0: 46.5,
        lon0: 11.5,
        u: 1.5,
        v: 3.0,
        depth0: 20.0,
        deepen: 150.0,
        t_mid: 30.0,
        t_scale: 12.0,
        radius_km: 420.0,
        heat: 2.5,
    },
};

/// The global scenario: jets in both hemispheres, wavenumber 5 (north) and 4
/// (south) moving east, a range along 105 W, heating over the northern ocean.
const GLOBAL: Weather = Weather {
    zone_width: 0.25,
    zone_contrast: 15.0,
    wave: Wave::Zonal {
        k_north: 5.0,
        k_south: 4.0,
        lon0: -150.0,
        speed: 10.0,
        south: 0.7,
    },
    range: Range {
        lon: -105.0,
        lat_s: 33.0,
        lat_n: 58.0,
        taper: 4.0,
        height: 2500.0,
        half_width_km: 450.0,
        lee_offset_km: 700.0,
        lee_width_km: 550.0,
    },
    heating: Heating {
        lat0: 38.0,
        lon0: -175.0,
        radius_km: 900.0,
        gain: 3.0,
        t_mid: 24.0,
        t_scale: 12.0,
    },
    meander: 6.0,
    meander_reach: 16.0,
    core_reach: 12.0,
    cold: 2.0,
    warm: 2.0,
    dome: 3.0,
    lee_base: 1.2,
    lee_boost: 2.6,
    lee_reach: 1.0,
    low: 30.0,
    low_ahead: 18.0,
    lee_low: LeeLow {
        lat0: 42.0,
        lon0: -96.0,
        u: 3.0,
        v: 3.0,
        depth0: 20.0,
        deepen: 90.0,
        t_mid: 30.0,
        t_scale: 12.0,
        radius_km: 800.0,
        heat: 2.5,
    },
};

fn wrap180(d: f64) -> f64 {
    (d + 180.0).rem_euclid(360.0) - 180.0
}

fn gauss(x: f64) -> f64 {
    (-x * x).exp()
}

/// Eastward distance from longitude `lon0` to `lon` along latitude `lat`, km.
fn east_km(lat: f64, lon: f64, lon0: f64) -> f64 {
    wrap180(lon - lon0) * DEG * EARTH_RADIUS * (lat * DEG).cos() / 1000.0
}

/// Degrees of longitude covered along latitude `lat` in `t` hours at `speed` m/s.
fn travelled(speed: f64, lat: f64, t: f64) -> f64 {
    speed * t * 3600.0 / (EARTH_RADIUS * (lat * DEG).cos()) / DEG
}

/// The wave at a point: 1 on a trough's axis, negative in a ridge, 0 far from
/// both; and how near the trough is to the range (1 over it, 0 far away).
fn wave_shape(w: &Weather, lat: f64, lon: f64, t: f64) -> (f64, f64) {
    match w.wave {
        Wave::Trough {
            lon0,
            lat: lat_c,
            speed,
            length_km,
            tilt,
        } => {
            let moved = travelled(speed, lat_c, t);
            let axis = lon0 + moved + tilt * (lat - lat_c);
            let dx = east_km(lat, lon, axis) / length_km;
            let x = gauss(dx) - 0.35 * gauss(dx - 1.9);
            let to_range = east_km(47.0, w.range.lon, lon0 + moved);
            (x, gauss(to_range / w.lee_reach))
        }
        Wave::Zonal {
            k_north,
            k_south,
            lon0,
            speed,
            south,
        } => {
            let omega = speed * 3600.0 / (EARTH_RADIUS * (47f64 * DEG).cos()); // rad/h at k = 1
            let phase = |k: f64, l: f64| k * wrap180(l - lon0) * DEG - k * omega * t;
            let x = if lat >= 0.0 {
                phase(k_north, lon).cos()
            } else {
                south * phase(k_south, lon).cos()
            };
            let at_range = phase(k_north, w.range.lon);
            let psi = (at_range + std::f64::consts::PI).rem_euclid(2.0 * std::f64::consts::PI)
                - std::f64::consts::PI;
            (x, gauss(psi / w.lee_reach))
        }
    }
}

impl LeeLow {
    /// Centre at valid hour `t`, degrees: a straight drift from its place at hour 0.
    fn centre(&self, t: f64) -> (f64, f64) {
        let (lat, lon) = advance(self.lat0, self.lon0, self.u, self.v, t);
        (lat, wrap180(lon))
    }

    /// The share of its deepening done by valid hour `t`, 0..1.
    fn grown(&self, t: f64) -> f64 {
        0.5 * (1.0 + ((t - self.t_mid) / self.t_scale).tanh())
    }

    /// Depth at 1000 hPa at valid hour `t`, gpm.
    fn depth(&self, t: f64) -> f64 {
        self.depth0 + self.deepen * self.grown(t)
    }

    /// Its shape at (lat, lon) at hour `t`, 1 at the centre.
    fn shape(&self, lat: f64, lon: f64, t: f64) -> f64 {
        let (la, lo) = self.centre(t);
        let (ex, ny) = (
            east_km(lat, lon, lo),
            (lat - la) * DEG * EARTH_RADIUS / 1000.0,
        );
        gauss(ex.hypot(ny) / self.radius_km)
    }
}

/// Everything about one column that does not depend on pressure.
#[derive(Debug, Clone, Copy)]
struct Setup {
    /// Background troposphere: T = t1000 (p/1000)^c_trop.
    t1000: f64,
    c_trop: f64,
    /// Background stratosphere: T = t250 + warming ln(250/p) above 250 hPa.
    t250: f64,
    warming: f64,
    /// Anomalies, K (cold and warm: of the trough; dome, lee, heat: as named).
    cold: f64,
    warm: f64,
    dome: f64,
    lee: f64,
    heat: f64,
    /// 0..1: moistening by the heating, drying in the lee.
    moist: f64,
    dry: f64,
    /// Heating round the lee low, K at 650 hPa, and its moistening, 0..1.
    storm: f64,
    storm_moist: f64,
    /// Reference height at 1000 hPa without the compensated anomalies, gpm.
    z1000: f64,
    /// Terrain height, gpm.
    terrain: f64,
}

/// Where the heating patch is at one time and how far its heating has got.
#[derive(Debug, Clone, Copy)]
struct HeatNow {
    lat: f64,
    lon: f64,
    /// Fraction of the heating done, 0..1.
    gained: f64,
    /// Heating rate relative to its peak, 0..1.
    active: f64,
}

/// No heating at all: for the wind that carries the patch.
const NO_HEAT: HeatNow = HeatNow {
    lat: 0.0,
    lon: 0.0,
    gained: 0.0,
    active: 0.0,
};

/// Fraction of the heating that leaves the heights above the patch unchanged: the
/// rest raises them (an anticyclone above the heating, a cyclone below).
const HEAT_COMPENSATED: f64 = 0.7;

fn advance(lat: f64, lon: f64, u: f64, v: f64, dt_h: f64) -> (f64, f64) {
    let s = dt_h * 3600.0 / EARTH_RADIUS / DEG;
    (lat + v * s, lon + u * s / (lat * DEG).cos())
}

/// Valid hours after which the heating patch stops travelling and fades away
/// over a day (the scenario is meant for the days around its origin).
const PATCH_LIFETIME_H: f64 = 168.0;

/// The heating patch at valid hour `t`: carried from its place at hour 0 by the
/// scenario's own geostrophic wind averaged over 600, 500 and 400 hPa (without
/// the patch's own circulation, which has no net push on its centre), in steps of
/// at most one hour with the midpoint rule.
fn heat_now(w: &Weather, valid_h: f64) -> HeatNow {
    let t = valid_h.clamp(-PATCH_LIFETIME_H, PATCH_LIFETIME_H);
    let h = &w.heating;
    let steer = |lat: f64, lon: f64, tt: f64| {
        let (u, v) = geostrophic(w, lat, lon, tt, &NO_HEAT);
        let k = [8, 10, 12]; // 600, 500, 400 hPa
        (
            k.iter().map(|&k| u[k]).sum::<f64>() / 3.0,
            k.iter().map(|&k| v[k]).sum::<f64>() / 3.0,
        )
    };
    let n = (t.abs().ceil() as usize).max(1);
    let dt = t / n as f64;
    let (mut lat, mut lon) = (h.lat0, h.lon0);
    for k in 0..n {
        let tt = k as f64 * dt;
        let (u1, v1) = steer(lat, lon, tt);
        let (lm, om) = advance(lat, lon, u1, v1, 0.5 * dt);
        let (u2, v2) = steer(lm, om, tt + 0.5 * dt);
        (lat, lon) = advance(lat, lon, u2, v2, dt);
    }
    let s = (valid_h - h.t_mid) / h.t_scale;
    let fade = gauss((valid_h.abs() - PATCH_LIFETIME_H).max(0.0) / 24.0);
    HeatNow {
        lat,
        lon: wrap180(lon),
        gained: fade * 0.5 * (1.0 + s.tanh()),
        active: fade / s.cosh(),
    }
}

fn setup(w: &Weather, lat: f64, lon: f64, t: f64, hn: &HeatNow) -> Setup {
    let (x, near) = wave_shape(w, lat, lon, t);
    // The zone follows the wave: a point in a trough sees the air of higher latitudes.
    let sin2 = (2.0 * lat * DEG).sin();
    let lat_eff = lat
        + lat.signum() * w.meander * x * sin2 * sin2 * gauss((lat.abs() - 47.0) / w.meander_reach);
    let zone = |la: f64| (((la * DEG).sin().powi(2) - ZONE_S0) / w.zone_width).tanh();
    let tau = zone(lat_eff);
    let lapse = 6.3 - 0.5 * tau; // K/km
    let core = x * gauss((lat.abs() - 50.0) / w.core_reach);

    // The range, its cold dome and its lee.
    let r = &w.range;
    let along = 0.5 * (((lat - r.lat_s) / r.taper).tanh() - ((lat - r.lat_n) / r.taper).tanh());
    let dx = east_km(lat, lon, r.lon);
    let terrain = r.height * gauss(dx / r.half_width_km) * along;
    let lee_shape = gauss((dx - r.lee_offset_km) / r.lee_width_km) * along;
    let lee_strength = (w.lee_base + w.lee_boost * near) / (w.lee_base + w.lee_boost);

    // The heating patch.
    let h = &w.heating;
    let (ex, ny) = (
        east_km(lat, lon, hn.lon),
        (lat - hn.lat) * DEG * EARTH_RADIUS / 1000.0,
    );
    let patch = gauss(ex.hypot(ny) / h.radius_km);

    // The surface low ahead of the trough.
    let low = match w.wave {
        Wave::Trough {
            lon0,
            lat: lat_c,
            speed,
            ..
        } => {
            let ahead = east_km(lat, lon, lon0 + travelled(speed, lat_c, t)) - w.low_ahead;
            gauss(ahead / 600.0) * gauss((lat - lat_c - 5.0) / 4.0)
        }
        // A quarter wavelength or so east of each trough.
        Wave::Zonal { .. } => {
            wave_shape(w, lat, lon - w.low_ahead, t).0 * gauss((lat.abs() - 50.0) / 10.0)
        }
    };

    // The lee low, and its heating a little downstream (east) of its centre.
    let ll = &w.lee_low;
    let ll_shape = ll.shape(lat, lon, t);
    let storm = ll.shape(lat, lon - 1.5, t);

    Setup {
        t1000: 281.0 - w.zone_contrast * tau,
        c_trop: R_DRY * lapse / 1000.0 / G0,
        // Warmer above the low polar tropopause, warming with height on the
        // subtropical side: the jet weakens above its core.
        t250: 220.0 + 3.5 * tau,
        warming: 0.3 + 1.5 * (1.0 - tau),
        cold: w.cold * core,
        warm: w.warm * core,
        dome: w.dome * terrain / r.height,
        lee: (w.lee_base + w.lee_boost * near) * lee_shape,
        heat: h.gain * hn.gained * patch,
        moist: hn.active * patch,
        dry: 0.35 * lee_strength * lee_shape,
        storm: ll.heat * ll.grown(t) * storm,
        storm_moist: storm,
        z1000: 95.0 - 40.0 * zone(lat) - w.low * low - ll.depth(t) * ll_shape,
        terrain,
    }
}

/// Temperature and humidity at one pressure of a column.
#[derive(Debug, Clone, Copy)]
struct Point {
    /// Temperature, K.
    t: f64,
    /// The part of it whose height signal is taken out above it (dome, lee, most of the heating), K.
    compensated: f64,
    /// Specific humidity, kg/kg.
    q: f64,
}

fn point(s: &Setup, p: f64) -> Point {
    let x = (1000.0 / p).ln();
    let trop = s.t1000 * (p / 1000.0).powf(s.c_trop) - s.cold * (0.3 + 0.7 * x / 1.2);
    let above = (250.0 / p).ln();
    let strat = s.t250 + s.warming * above + s.warm * gauss(above / 0.5);
    let d = trop - strat;
    let blend = TROPOPAUSE_BLEND;
    let base = trop.max(strat) + blend * (-(d.abs()) / blend).exp().ln_1p();
    let w_strat = 1.0 / (1.0 + (d / blend).exp());
    let dome = -s.dome * (-x / 0.35).exp();
    let lee = s.lee * gauss((p - 800.0) / 170.0);
    let heat = s.heat * gauss((p - 500.0) / 120.0);
    let storm = s.storm * gauss((p - 650.0) / 150.0);
    let t = base + dome + lee + heat + storm;
    // Relative humidity: moist low levels, dry aloft; drier in the lee, near
    // saturation where the heating goes on. Taken on the tropospheric branch so
    // that humidity keeps falling with height through the tropopause.
    let rh_bg = 0.2 + 0.6 * ((p - 200.0) / 800.0).clamp(0.0, 1.1).powf(1.3);
    let mut rh = rh_bg * (1.0 - s.dry * gauss((p - 800.0) / 200.0));
    let deep = ((p - 560.0) / 250.0).powi(4);
    rh += (0.97 - rh) * s.moist * (-deep).exp();
    rh += (0.95 - rh) * s.storm_moist * (-((p - 750.0) / 250.0).powi(4)).exp();
    let q_trop = specific_humidity_from_rh(100.0 * rh, trop + dome + lee + heat + storm, p * 100.0);
    let q = (1.0 - w_strat) * q_trop + w_strat * Q_STRATOSPHERE;
    Point {
        t,
        compensated: dome + lee + HEAT_COMPENSATED * (heat + storm),
        q,
    }
}

/// One column: values on the scenario's levels and at the ground.
#[derive(Debug, Clone)]
struct Column {
    t: [f64; 21],
    q: [f64; 21],
    z: [f64; 21],
    surface_pressure: f64,
    terrain: f64,
    /// Pressure reduced to mean sea level, Pa.
    mslp: f64,
}

fn integrate_from(s: &Setup, a: f64, b: f64) -> (f64, f64) {
    // Simpson's rule in ln p from pressure a to b (hPa): (Tv, compensated part).
    let (la, lb) = (a.ln(), b.ln());
    let n = 2 * PANELS;
    let h = (lb - la) / n as f64;
    let (mut tv, mut comp) = (0.0, 0.0);
    for k in 0..=n {
        let wgt = if k == 0 || k == n {
            1.0
        } else if k % 2 == 1 {
            4.0
        } else {
            2.0
        };
        let pt = point(s, (la + h * k as f64).exp());
        tv += wgt * virtual_temperature(pt.t, pt.q);
        comp += wgt * pt.compensated;
    }
    (tv * h / 3.0, comp * h / 3.0)
}

fn column(w: &Weather, lat: f64, lon: f64, t: f64, hn: &HeatNow) -> Column {
    let s = setup(w, lat, lon, t, hn);
    let mut col = Column {
        t: [0.0; 21],
        q: [0.0; 21],
        z: [0.0; 21],
        surface_pressure: f64::NAN,
        terrain: s.terrain,
        mslp: f64::NAN,
    };
    // Hypsometric equation upward from 1000 hPa: Z(p) = Z(1000) + (R/g) int_p^1000 Tv dln p.
    let mut tv_int = [0.0; 21];
    let mut comp_total = 0.0;
    for k in 1..21 {
        let (a, c) = integrate_from(&s, LEVELS_HPA[k - 1], LEVELS_HPA[k]);
        tv_int[k] = tv_int[k - 1] - a; // a < 0: ln p decreases upward
        comp_total -= c;
    }
    // The dome, the lee warm core and most of the heating leave the heights above them
    // unchanged: their hydrostatic signal goes into the 1000 hPa reference instead.
    let z1000 = s.z1000 - R_DRY / G0 * comp_total;
    for (k, &p) in LEVELS_HPA.iter().enumerate() {
        let pt = point(&s, p);
        col.t[k] = pt.t;
        col.q[k] = pt.q;
        col.z[k] = z1000 + R_DRY / G0 * tv_int[k];
    }
    // Humidity never rises with height.
    for k in 1..21 {
        col.q[k] = col.q[k].min(col.q[k - 1]);
    }
    // Surface pressure: where the isobaric height equals the terrain height, from
    // the nearest level below, with the layer's mean virtual temperature.
    let k0 = (0..21).rev().find(|&k| col.z[k] <= s.terrain).unwrap_or(0);
    let (p0, z0) = (LEVELS_HPA[k0], col.z[k0]);
    let mut lnps = p0.ln();
    for _ in 0..4 {
        let mid = (0.5 * (p0.ln() + lnps)).exp();
        let pt = point(&s, mid);
        let tv = virtual_temperature(pt.t, pt.q);
        lnps = p0.ln() - (s.terrain - z0) * G0 / (R_DRY * tv);
    }
    col.surface_pressure = lnps.exp() * 100.0;
    // Mean sea-level pressure as the scenario's model reduces it: from 1000 hPa to
    // z = 0 with the 1000 hPa virtual temperature warmed by 6.5 K/km over half the
    // depth (hypsometric equation).
    let tv_mean = virtual_temperature(col.t[0], col.q[0]) + 0.5 * 0.0065 * col.z[0];
    col.mslp = 1.0e5 * (G0 * col.z[0] / (R_DRY * tv_mean)).exp();
    col
}

/// Geostrophic wind (east, north) from heights at offsets of `d` degrees in latitude
/// and longitude: u = -(g / f a) dZ/dphi, v = (g / f a cos phi) dZ/dlambda. Near the
/// equator 1/f is tapered to zero (the scenario's gradients vanish there too).
fn geostrophic(w: &Weather, lat: f64, lon: f64, t: f64, hn: &HeatNow) -> ([f64; 21], [f64; 21]) {
    let d = 0.01;
    let (mut u, mut v) = ([0.0; 21], [0.0; 21]);
    let cos = (lat * DEG).cos();
    if cos < 1e-6 {
        return (u, v); // at a pole: no direction, and the scenario's flow is calm there
    }
    let sin = (lat * DEG).sin();
    let floor = (15.0 * DEG).sin();
    let inv_f = sin / (2.0 * OMEGA * (sin * sin).max(floor * floor));
    let (n, s) = (
        column(w, lat + d, lon, t, hn),
        column(w, lat - d, lon, t, hn),
    );
    let (e, wz) = (
        column(w, lat, lon + d, t, hn),
        column(w, lat, lon - d, t, hn),
    );
    for k in 0..21 {
        let dzdphi = (n.z[k] - s.z[k]) / (2.0 * d * DEG);
        let dzdlam = (e.z[k] - wz.z[k]) / (2.0 * d * DEG);
        u[k] = -G0 * inv_f * dzdphi / EARTH_RADIUS;
        v[k] = G0 * inv_f * dzdlam / (EARTH_RADIUS * cos);
    }
    (u, v)
}

/// One level of a step, each field with rows south to north.
#[derive(Debug, Clone)]
pub struct LevelFields {
    /// Pressure, hPa.
    pub p: f64,
    /// Temperature, K.
    pub t: Vec<f64>,
    /// Specific humidity, kg/kg.
    pub q: Vec<f64>,
    /// Geopotential height, gpm.
    pub z: Vec<f64>,
    /// Wind components along the grid's x and y axes (east and north on a latitude/longitude grid), m/s.
    pub u: Vec<f64>,
    pub v: Vec<f64>,
}

/// One step of a scenario on its grid.
#[derive(Debug, Clone)]
pub struct StepFields {
    /// Terrain (geopotential height of the ground), gpm.
    pub terrain: Vec<f64>,
    /// Surface pressure, Pa.
    pub surface_pressure: Vec<f64>,
    /// Pressure reduced to mean sea level, Pa.
    pub mslp: Vec<f64>,
    /// Every level, from the bottom up.
    pub levels: Vec<LevelFields>,
}

/// Columns and grid-relative winds gathered into the fields of a step.
fn gather(cols: &[(Column, [f64; 21], [f64; 21])]) -> StepFields {
    let levels = LEVELS_HPA
        .iter()
        .enumerate()
        .map(|(k, &p)| LevelFields {
            p,
            t: cols.iter().map(|c| c.0.t[k]).collect(),
            q: cols.iter().map(|c| c.0.q[k]).collect(),
            z: cols.iter().map(|c| c.0.z[k]).collect(),
            u: cols.iter().map(|c| c.1[k]).collect(),
            v: cols.iter().map(|c| c.2[k]).collect(),
        })
        .collect();
    StepFields {
        terrain: cols.iter().map(|c| c.0.terrain).collect(),
        surface_pressure: cols.iter().map(|c| c.0.surface_pressure).collect(),
        mslp: cols.iter().map(|c| c.0.mslp).collect(),
        levels,
    }
}

/// A step at any points (latitude, longitude, angle from east to grid x), with
/// the winds from heights at small offsets around each point.
fn fields(w: &Weather, points: &[(f64, f64, f64)], t: f64) -> StepFields {
    let hn = heat_now(w, t);
    let cols: Vec<(Column, [f64; 21], [f64; 21])> = points
        .par_iter()
        .map(|&(la, lo, alpha)| {
            let c = column(w, la, lo, t, &hn);
            let (ue, ve) = geostrophic(w, la, lo, t, &hn);
            // Into the grid's axes (alpha: angle from east to grid x).
            let (s, co) = alpha.sin_cos();
            let mut u = [0.0; 21];
            let mut v = [0.0; 21];
            for k in 0..21 {
                u[k] = ue[k] * co + ve[k] * s;
                v[k] = -ue[k] * s + ve[k] * co;
            }
            (c, u, v)
        })
        .collect();
    gather(&cols)
}

/// A step on a Lambert conformal grid. The heights are computed on the grid and
/// one ring of points around it, and the geostrophic wind comes out along the
/// grid's axes from centred differences in the map plane:
/// u = -(g m / f) dZ/dy, v = (g m / f) dZ/dx, m the map scale factor.
fn fields_on_plane(w: &Weather, grid: GridSpec, t: f64) -> StepFields {
    let GridSpec::Lambert {
        nx,
        ny,
        lat1,
        lon1,
        dx,
        dy,
        lov,
        latin1,
        latin2,
    } = grid
    else {
        return fields(w, &grid_points(grid), t);
    };
    let earth = Earth::sphere(EARTH_RADIUS);
    let proj = Conformal::Lambert {
        lat1: latin1,
        lat2: latin2,
        lat0: latin1,
        lon0: lov,
    };
    let (x0, y0) = proj.forward(&earth, lat1, lon1);
    let hn = heat_now(w, t);
    let (wx, wy) = (nx + 2, ny + 2);
    let ring: Vec<(f64, f64, Column)> = (0..wx * wy)
        .into_par_iter()
        .map(|n| {
            let (i, j) = ((n % wx) as f64 - 1.0, (n / wx) as f64 - 1.0);
            let (la, lo) = proj.inverse(&earth, x0 + i * dx, y0 + j * dy);
            (la, lo, column(w, la, lo, t, &hn))
        })
        .collect();
    let at = |i: usize, j: usize| &ring[(j + 1) * wx + i + 1];
    let cols: Vec<(Column, [f64; 21], [f64; 21])> = (0..nx * ny)
        .map(|n| {
            let (i, j) = (n % nx, n / nx);
            let (la, _, c) = at(i, j);
            let m = proj.scale_factor(&earth, *la);
            let gm_f = G0 * m / (2.0 * OMEGA * (la * DEG).sin());
            let (e, wz) = (&at(i + 1, j).2, &ring[(j + 1) * wx + i].2);
            let (nn, s) = (&at(i, j + 1).2, &ring[j * wx + i + 1].2);
            let mut u = [0.0; 21];
            let mut v = [0.0; 21];
            for k in 0..21 {
                u[k] = -gm_f * (nn.z[k] - s.z[k]) / (2.0 * dy);
                v[k] = gm_f * (e.z[k] - wz.z[k]) / (2.0 * dx);
            }
            (c.clone(), u, v)
        })
        .collect();
    gather(&cols)
}

/// (latitude, longitude, angle from east to grid x) of every point of a grid, rows south to north.
pub fn grid_points(grid: GridSpec) -> Vec<(f64, f64, f64)> {
    match grid {
        GridSpec::Lambert {
            nx,
            ny,
            lat1,
            lon1,
            dx,
            dy,
            lov,
            latin1,
            latin2,
        } => {
            let earth = Earth::sphere(EARTH_RADIUS);
            let proj = Conformal::Lambert {
                lat1: latin1,
                lat2: latin2,
                lat0: latin1,
                lon0: lov,
            };
            let (x0, y0) = proj.forward(&earth, lat1, lon1);
            let mut points = Vec::with_capacity(nx * ny);
            for j in 0..ny {
                for i in 0..nx {
                    let (la, lo) = proj.inverse(&earth, x0 + i as f64 * dx, y0 + j as f64 * dy);
                    points.push((la, lo, proj.grid_rotation(&earth, la, lo)));
                }
            }
            points
        }
        GridSpec::LatLon {
            ni,
            nj,
            lat0,
            lon0,
            dlat,
            dlon,
        } => {
            let mut points = Vec::with_capacity(ni * nj);
            for j in 0..nj {
                for i in 0..ni {
                    points.push((lat0 + j as f64 * dlat, lon0 + i as f64 * dlon, 0.0));
                }
            }
            points
        }
    }
}

/// The regional scenario at `valid_h` hours after 2026-03-14 00 UTC, on [`GRID`].
pub fn step(valid_h: f64) -> StepFields {
    fields_on_plane(&REGIONAL, GRID, valid_h)
}

/// The global scenario at `valid_h` hours after 2026-03-14 00 UTC, on [`GLOBAL_GRID`].
pub fn global_step(valid_h: f64) -> StepFields {
    fields(&GLOBAL, &grid_points(GLOBAL_GRID), valid_h)
}

/// Centre of the regional scenario's heating patch at `valid_h` (latitude, longitude).
pub fn heating_centre(valid_h: f64) -> (f64, f64) {
    let h = heat_now(&REGIONAL, valid_h);
    (h.lat, h.lon)
}

/// Centre of the regional scenario's lee low at `valid_h` (latitude, longitude).
pub fn lee_low_centre(valid_h: f64) -> (f64, f64) {
    REGIONAL.lee_low.centre(valid_h)
}

/// Centre of the global scenario's heating patch at `valid_h` (latitude, longitude).
pub fn global_heating_centre(valid_h: f64) -> (f64, f64) {
    let h = heat_now(&GLOBAL, valid_h);
    (h.lat, h.lon)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::diagnostics::constants::KAPPA;
    use crate::diagnostics::thickness::{hypsometric_thickness, saturation_vapour_pressure};

    fn theta(t: f64, p_hpa: f64) -> f64 {
        t * (1000.0 / p_hpa).powf(KAPPA)
    }

    /// A column of the regional scenario with its heating patch.
    fn regional_column(lat: f64, lon: f64, t: f64) -> Column {
        column(&REGIONAL, lat, lon, t, &heat_now(&REGIONAL, t))
    }

    /// Every 6th point of the regional grid in both directions.
    fn sample() -> Vec<(f64, f64, f64)> {
        let (nx, ny) = (97, 81);
        let all = grid_points(GRID);
        (0..ny)
            .step_by(6)
            .flat_map(|j| (0..nx).step_by(6).map(move |i| j * nx + i))
            .map(|k| all[k])
            .collect()
    }

    /// Checks every column of a step: hydrostatic heights, static stability above
    /// the ground, humidity falling with height and never supersaturated, the
    /// surface pressure where the heights meet the terrain.
    fn check_columns(s: &StepFields, what: &str) {
        let p_pa: Vec<f64> = LEVELS_HPA.iter().rev().map(|p| p * 100.0).collect();
        for n in 0..s.terrain.len() {
            let ps = s.surface_pressure[n] / 100.0;
            let col = |f: fn(&LevelFields) -> &Vec<f64>| -> Vec<f64> {
                s.levels.iter().map(|l| f(l)[n]).collect()
            };
            let (t, q, z) = (col(|l| &l.t), col(|l| &l.q), col(|l| &l.z));
            // Thickness of each layer from T and q on the levels (leeward's own formula,
            // which cannot see the bend of the tropopause inside a layer) against the
            // heights: within 0.5 %.
            let tv: Vec<f64> = (0..21)
                .rev()
                .map(|k| virtual_temperature(t[k], q[k]))
                .collect();
            for k in 0..20 {
                let dz = hypsometric_thickness(&tv, &p_pa, p_pa[20 - k], p_pa[19 - k]);
                let got = z[k + 1] - z[k];
                assert!(
                    (got - dz).abs() < 0.005 * dz,
                    "{what} {n} {} hPa: {got} vs {dz}",
                    LEVELS_HPA[k]
                );
            }
            for k in 0..21 {
                let p = LEVELS_HPA[k];
                assert!((190.0..315.0).contains(&t[k]), "{what} {n} {p}: T {}", t[k]);
                let e = q[k] * p * 100.0 / (0.622 + 0.378 * q[k]);
                assert!(
                    q[k] > 0.0 && e <= saturation_vapour_pressure(t[k]) * 1.0001,
                    "{what} {n} {p}: q {}",
                    q[k]
                );
                if k > 0 {
                    assert!(q[k] <= q[k - 1], "{what} {n} {p}: q rises");
                    if LEVELS_HPA[k - 1] <= ps {
                        let (lo, hi) = (theta(t[k - 1], LEVELS_HPA[k - 1]), theta(t[k], p));
                        assert!(
                            hi > lo + 0.5,
                            "{what} {n} {p}: theta {lo} below, {hi} above"
                        );
                    }
                }
            }
            // The heights reach the terrain at the surface pressure (log-linear in p).
            let k = LEVELS_HPA.iter().rposition(|&p| p >= ps).unwrap_or(0);
            let zs = if ps > 1000.0 {
                let w = (1000.0 / ps).ln() / (1000.0f64 / 950.0).ln();
                z[0] + w * (z[1] - z[0])
            } else {
                let w = (LEVELS_HPA[k] / ps).ln() / (LEVELS_HPA[k] / LEVELS_HPA[k + 1]).ln();
                z[k] + w * (z[k + 1] - z[k])
            };
            assert!(
                (zs - s.terrain[n]).abs() < 3.0,
                "{what} {n}: Z(ps) {zs} vs {}",
                s.terrain[n]
            );
        }
    }

    #[test]
    fn regional_columns_are_hydrostatic_stable_and_plausible() {
        for t in [0.0, 24.0, 48.0] {
            let s = fields(&REGIONAL, &sample(), t);
            check_columns(&s, &format!("regional +{t}h"));
            let ps = &s.surface_pressure;
            let max_ps = ps.iter().copied().fold(0.0, f64::max);
            let min_ps = ps.iter().copied().fold(f64::INFINITY, f64::min);
            assert!(
                max_ps < 103_000.0 && min_ps > 75_000.0,
                "{min_ps}..{max_ps}"
            );
            for l in &s.levels {
                let vmax =
                    l.u.iter()
                        .zip(&l.v)
                        .map(|(u, v)| u.hypot(*v))
                        .fold(0.0, f64::max);
                assert!(vmax < 70.0, "+{t}h {} hPa: wind up to {vmax}", l.p);
            }
            let jet = &s.levels[15]; // 250 hPa
            let umax = jet.u.iter().copied().fold(0.0, f64::max);
            assert!(umax > 35.0, "+{t}h: the jet at 250 hPa only {umax}");
        }
    }

    #[test]
    fn winds_on_the_plane_match_the_winds_from_offsets() {
        let s = step(30.0);
        let all = grid_points(GRID);
        let mut worst: f64 = 0.0;
        for n in (0..all.len()).step_by(331) {
            let (la, lo, alpha) = all[n];
            let (ue, ve) = geostrophic(&REGIONAL, la, lo, 30.0, &heat_now(&REGIONAL, 30.0));
            let (sn, cs) = alpha.sin_cos();
            for (k, l) in s.levels.iter().enumerate() {
                let (u, v) = (ue[k] * cs + ve[k] * sn, -ue[k] * sn + ve[k] * cs);
                let err = (l.u[n] - u).hypot(l.v[n] - v);
                assert!(err < 0.5 + 0.03 * u.hypot(v), "{n} {} hPa: {err}", l.p);
                worst = worst.max(err);
            }
        }
        assert!(worst > 0.0);
    }

    #[test]
    fn the_crest_stands_at_about_770_hpa() {
        let c = regional_column(47.0, 8.0, 0.0);
        assert!((2150.0..2200.0).contains(&c.terrain), "{}", c.terrain);
        assert!(
            (76_000.0..78_000.0).contains(&c.surface_pressure),
            "{}",
            c.surface_pressure
        );
        let sea = regional_column(47.0, -10.0, 0.0);
        assert!(sea.terrain < 1.0 && sea.surface_pressure > 99_000.0);
    }

    #[test]
    fn the_trough_moves_east_and_lowers_the_tropopause() {
        // Lowest 300 hPa height along 50 N, and the coldest level of that column.
        let trough = |t: f64| {
            (-25..=20)
                .map(|l| {
                    let c = regional_column(50.0, f64::from(l), t);
                    (c.z[14], f64::from(l), c)
                })
                .min_by(|a, b| a.0.total_cmp(&b.0))
                .unwrap()
        };
        let (z0, lon0, c0) = trough(0.0);
        let (_, lon24, _) = trough(24.0);
        // 12 m/s for a day at 50 N is 15.1 degrees.
        assert!((12.0..18.0).contains(&(lon24 - lon0)), "{lon0} -> {lon24}");
        let ridge = regional_column(50.0, lon0 + 30.0, 0.0);
        assert!(
            ridge.z[14] - z0 > 100.0,
            "trough only {} m deep",
            ridge.z[14] - z0
        );
        // The cold point (thermal tropopause) is lower in the trough than downstream.
        // The thermal tropopause: the lowest level above 500 hPa from which the
        // temperature falls by less than 2 K/km to the next level up.
        let tropopause = |c: &Column| {
            (10..20)
                .find(|&k| (c.t[k] - c.t[k + 1]) / (c.z[k + 1] - c.z[k]) < 0.002)
                .map_or(f64::NAN, |k| LEVELS_HPA[k])
        };
        let (low, high) = (tropopause(&c0), tropopause(&ridge));
        assert!(low > high, "trough {low} hPa, downstream {high} hPa");
        for p in [low, high] {
            assert!((200.0..=350.0).contains(&p), "{p}");
        }
    }

    #[test]
    fn the_lee_trough_deepens_as_the_trough_comes() {
        // The lee trough alone: the lee low, which forms in it and drifts away, left out.
        let no_low = Weather {
            lee_low: LeeLow {
                depth0: 0.0,
                deepen: 0.0,
                heat: 0.0,
                ..REGIONAL.lee_low
            },
            ..REGIONAL
        };
        let ps: Vec<f64> = [0.0, 12.0, 24.0, 36.0, 48.0]
            .iter()
            .map(|&t| {
                column(&no_low, 47.0, 11.5, t, &heat_now(&no_low, t)).surface_pressure / 100.0
            })
            .collect();
        assert!(ps.windows(2).all(|w| w[1] < w[0]), "{ps:?}");
        assert!(ps[0] - ps[4] > 3.0, "{ps:?}");
        // Warmer east of the crest than west of it, at 800 hPa.
        let (east, west) = (
            regional_column(47.0, 11.5, 36.0),
            regional_column(47.0, 4.0, 36.0),
        );
        assert!(
            east.t[4] > west.t[4] + 1.0,
            "{} vs {}",
            east.t[4],
            west.t[4]
        );
    }

    #[test]
    fn the_heating_patch_moves_with_the_flow_warms_and_is_moist() {
        let (a, b) = (heat_now(&REGIONAL, 24.0), heat_now(&REGIONAL, 30.0));
        let mid = heat_now(&REGIONAL, 27.0);
        let (u, v) = geostrophic(&REGIONAL, mid.lat, mid.lon, 27.0, &NO_HEAT);
        let (u, v) = ((u[8] + u[10] + u[12]) / 3.0, (v[8] + v[10] + v[12]) / 3.0);
        let east = east_km(mid.lat, b.lon, a.lon) * 1000.0 / (6.0 * 3600.0);
        let north = (b.lat - a.lat) * DEG * EARTH_RADIUS / (6.0 * 3600.0);
        assert!(
            (east - u).abs() < 0.5 && (north - v).abs() < 0.5,
            "{east} {north} vs {u} {v}"
        );
        // Following the patch, theta at 500 hPa rises while the heating goes on.
        let th = |t: f64| {
            let h = heat_now(&REGIONAL, t);
            theta(regional_column(h.lat, h.lon, t).t[10], 500.0)
        };
        let (early, late) = (th(6.0), th(42.0));
        assert!(late - early > 2.5, "{early} -> {late}");
        // Near saturation at 500 hPa in the middle of the episode.
        let c = regional_column(mid.lat, mid.lon, 24.0);
        let e = c.q[10] * 50_000.0 / (0.622 + 0.378 * c.q[10]);
        let rh = e / saturation_vapour_pressure(c.t[10]);
        assert!(rh > 0.9, "RH {rh}");
    }

    #[test]
    fn the_lee_low_deepens_as_it_drifts_from_the_range() {
        // Its centre is the lowest mean sea-level pressure within 300 km, and that pressure
        // falls by more than 15 hPa over the 48 hours, fastest near hour 30.
        let at = |t: f64| {
            let (la, lo) = REGIONAL.lee_low.centre(t);
            let c = regional_column(la, lo, t).mslp;
            let ring = (0..8)
                .map(|k| {
                    let a = f64::from(k) * std::f64::consts::FRAC_PI_4;
                    let (dla, dlo) = (2.5 * a.sin(), 2.5 * a.cos() / (la * DEG).cos());
                    regional_column(la + dla, lo + dlo, t).mslp
                })
                .fold(f64::INFINITY, f64::min);
            (c, ring)
        };
        let p: Vec<(f64, f64)> = [0.0, 24.0, 36.0, 48.0].iter().map(|&t| at(t)).collect();
        eprintln!("lee low (centre, lowest 250 km away), Pa: {p:?}");
        // At hour 0 it is a dent in the lee trough; from hour 24 the lowest point round it.
        for (c, ring) in &p[1..] {
            assert!(c < ring, "{p:?}");
        }
        assert!(p[0].0 - p[3].0 > 1500.0, "{p:?}");
        // Faster between hours 24 and 36 than over the first day.
        assert!((p[1].0 - p[3].0) / 12.0 > (p[0].0 - p[1].0) / 24.0, "{p:?}");
        // Downstream (east) of the crest, and it ends inside the grid.
        let (la, lo) = lee_low_centre(48.0);
        assert!(
            lo > 12.0 && lo < 17.0 && la > 49.0 && la < 53.0,
            "{la} {lo}"
        );
    }

    #[test]
    fn global_columns_are_plausible_and_the_poles_calm() {
        let s = global_step(12.0);
        check_columns(&s, "global +12h");
        let (ni, nj) = (72, 37);
        for l in &s.levels {
            for i in 0..ni {
                for j in [0, nj - 1] {
                    assert_eq!((l.u[j * ni + i], l.v[j * ni + i]), (0.0, 0.0));
                }
            }
            let vmax =
                l.u.iter()
                    .zip(&l.v)
                    .map(|(u, v)| u.hypot(*v))
                    .fold(0.0, f64::max);
            assert!(vmax < 70.0, "{} hPa: wind up to {vmax}", l.p);
        }
        // Westerly jets in both hemispheres at 250 hPa.
        let jet = &s.levels[15];
        let row_max = |j: usize| (0..ni).map(|i| jet.u[j * ni + i]).fold(f64::MIN, f64::max);
        let north = (23..32).map(row_max).fold(f64::MIN, f64::max);
        let south = (5..14).map(row_max).fold(f64::MIN, f64::max);
        assert!(north > 30.0 && south > 30.0, "{north} {south}");
        let crest = s.terrain.iter().copied().fold(0.0, f64::max);
        assert!(crest > 2000.0, "{crest}");
    }
}
