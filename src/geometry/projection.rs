//! Map projections of the GRIB2 grid templates leeward supports.
//!
//! **What comes in:** the figure of the earth ([`Earth`], from GRIB2 code table 3.2) and the
//! projection parameters of grid templates 3.1 (rotated latitude/longitude, [`RotatedPole`]),
//! 3.10 (Mercator), 3.20 (polar stereographic) and 3.30 (Lambert conformal) as
//! [`Conformal`], plus the `N` of template 3.40 for [`gaussian_latitudes`]. Angles at this
//! interface are in degrees unless a function says radians; lengths are in metres.
//!
//! **What goes out:** projection coordinates `(x, y)` in metres with no false easting or
//! northing, geographic `(lat, lon)` with `lat` in `[-90, 90]` and `lon` in `[-180, 180)`,
//! map scale factors, the rotation angle between grid axes and local east/north (in
//! radians), and Gaussian latitudes. The forward and inverse maps are the same mathematics
//! PROJ applies to the CF 1.10 grid mappings (appendix F) built from the same parameters,
//! so a reader that calls `pyproj.CRS.from_cf` on our `crs` variable recovers our latitudes
//! and longitudes.
//!
//! **What it must never do:** panic, allocate per point, read files or log. Every function
//! is pure. A non-finite input, a latitude outside `[-90, 90]` or parameters that do not
//! define a projection (for example an earth with `b > a`, or Lambert standard parallels
//! symmetric about the equator) give NaN rather than an error, so callers can check
//! a projection once with `forward` on its own origin and treat NaN as "unusable grid".
//!
//! Formulas are from Snyder 1987, *Map Projections -- A Working Manual*, USGS Professional
//! Paper 1395; the equation numbers below are quoted from memory. The ellipsoidal forms are
//! used throughout: with eccentricity `e = 0` they reduce exactly to the spherical ones.
//!
//! Notation: `phi` latitude, `lambda` longitude (radians), `a` semi-major axis, `e`
//! eccentricity, and the two functions of latitude shared by all three conformal
//! projections,
//!
//! ```text
//! m(phi) = cos(phi) / sqrt(1 - e^2 sin^2(phi))                                (Snyder 14-15)
//! t(phi) = tan(pi/4 - phi/2) / ((1 - e sin(phi)) / (1 + e sin(phi)))^(e/2)    (Snyder 15-9)
//! ```
//!
//! `a m(phi)` is the radius of the parallel `phi`; `t` is `exp(-psi)` with `psi` the
//! isometric latitude.

use std::f64::consts::{FRAC_PI_2, PI};

/// Convergence of the latitude iteration of Snyder eq. 7-9, in radians (about 6 nm on the earth).
const PHI_TOLERANCE: f64 = 1e-15;
/// Iteration cap of Snyder eq. 7-9; it converges linearly with ratio about e^2, so a
/// dozen steps reach [`PHI_TOLERANCE`] on the earth's ellipsoid.
const PHI_MAX_ITERATIONS: usize = 40;
/// Below this difference (radians) two Lambert standard parallels count as one (tangent cone).
const TANGENT_CONE: f64 = 1e-10;
/// Largest |n| the Gaussian latitude routine accepts; larger requests give an empty vector.
/// 20 000 is more than twice the N of the finest operational Gaussian grids.
const GAUSSIAN_MAX_N: usize = 20_000;
/// Newton convergence of a Gaussian latitude, on mu = sin(latitude).
const GAUSSIAN_TOLERANCE: f64 = 1e-14;
/// Newton iteration cap for one Gaussian latitude.
const GAUSSIAN_MAX_ITERATIONS: usize = 100;

/// Figure of the earth. A sphere when `a == b`.
///
/// Valid figures have `a > 0` and `0 < b <= a`, both finite; anything else makes every
/// projection return NaN.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Earth {
    /// Semi-major (equatorial) axis, metres.
    pub a: f64,
    /// Semi-minor (polar) axis, metres.
    pub b: f64,
}

impl Earth {
    /// A sphere of radius `r` metres (GRIB2 code table 3.2 entries 0, 1 and 6).
    pub fn sphere(r: f64) -> Self {
        Earth { a: r, b: r }
    }

    /// True when the figure is a sphere (`a == b`).
    pub fn is_sphere(&self) -> bool {
        self.a == self.b
    }

    /// First eccentricity `e = sqrt(1 - b^2/a^2)`; NaN for an invalid figure.
    pub fn eccentricity(&self) -> f64 {
        match self.checked() {
            Some((_, e)) => e,
            None => f64::NAN,
        }
    }

    /// Radius to use for derivatives on the sphere: `a` for a sphere, and for an ellipsoid
    /// the IUGG mean radius `R1 = (2a + b)/3` (the mean of the three semi-axes; 6 371 008.8 m
    /// for WGS 84). NaN for an invalid figure.
    pub fn mean_radius(&self) -> f64 {
        match self.checked() {
            Some(_) if self.is_sphere() => self.a,
            Some(_) => (2.0 * self.a + self.b) / 3.0,
            None => f64::NAN,
        }
    }

    /// `(a, e)` when the figure is valid.
    fn checked(&self) -> Option<(f64, f64)> {
        let ok = self.a.is_finite() && self.b.is_finite() && self.b > 0.0 && self.b <= self.a;
        if !ok {
            return None;
        }
        let ratio = self.b / self.a;
        Some((self.a, (1.0 - ratio * ratio).max(0.0).sqrt()))
    }
}

/// The conformal projections of GRIB2 templates 3.10 (Mercator), 3.20 (polar stereographic),
/// 3.30 (Lambert conformal).
///
/// Each maps to one CF 1.10 grid mapping (appendix F) and one PROJ operation:
///
/// | variant | CF `grid_mapping_name` and attributes | PROJ |
/// |---|---|---|
/// | `Mercator` | `mercator`: `standard_parallel = lat_ts`, `longitude_of_projection_origin = lon0` | `+proj=merc +lat_ts +lon_0` |
/// | `PolarStereographic` | `polar_stereographic`: `straight_vertical_longitude_from_pole = lon0`, `latitude_of_projection_origin = +-90`, `standard_parallel` | `+proj=stere +lat_0=+-90 +lat_ts +lon_0` |
/// | `Lambert` | `lambert_conformal_conic`: `standard_parallel = [lat1, lat2]`, `longitude_of_central_meridian = lon0`, `latitude_of_projection_origin = lat0` | `+proj=lcc +lat_1 +lat_2 +lat_0 +lon_0` |
///
/// Polar stereographic: PROJ picks the hemisphere from the sign of `standard_parallel`,
/// whereas GRIB2 says it with the projection centre flag. Here `north` decides and the true
/// scale latitude is `|lat_ts|` mirrored into that hemisphere, so a CF writer must emit
/// `standard_parallel = |lat_ts|` for a north pole grid and `-|lat_ts|` for a south pole
/// grid to keep PROJ in agreement.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Conformal {
    /// Mercator, true scale at latitude `lat_ts` (GRIB2 LaD), central meridian `lon0`.
    Mercator {
        /// Latitude of true scale, degrees, `|lat_ts| < 90`.
        lat_ts: f64,
        /// Central meridian, degrees.
        lon0: f64,
    },
    /// Polar stereographic on the north (or south) pole, true scale at `lat_ts` (GRIB2 LaD,
    /// e.g. 60), central meridian `lon0` (GRIB2 LoV: the meridian parallel to the grid's
    /// +y axis).
    PolarStereographic {
        /// Projection centre on the north pole (GRIB2 projection centre flag bit 1 clear).
        north: bool,
        /// Latitude of true scale, degrees; only `|lat_ts|` is used (see the type's doc).
        /// 90 means true scale at the pole.
        lat_ts: f64,
        /// Meridian along the grid's y axis (GRIB2 LoV), degrees.
        lon0: f64,
    },
    /// Lambert conformal conic with standard parallels lat1, lat2 (equal for tangent),
    /// latitude of origin lat0, central meridian lon0 (GRIB2 LoV).
    Lambert {
        /// First standard parallel (GRIB2 Latin 1), degrees, not a pole.
        lat1: f64,
        /// Second standard parallel (GRIB2 Latin 2), degrees, not a pole, not `-lat1`.
        lat2: f64,
        /// Latitude of the origin of y, degrees.
        lat0: f64,
        /// Central meridian (GRIB2 LoV), degrees.
        lon0: f64,
    },
}

/// Constants of a Lambert cone (Snyder 15-8, 15-10, 15-7).
struct Cone {
    /// Cone constant n; its sign is the hemisphere of the apex.
    n: f64,
    /// F, in units of a.
    f: f64,
    /// rho0 = a F t(lat0)^n, metres.
    rho0: f64,
}

impl Conformal {
    /// (x, y) in metres, no false easting/northing, for geographic (lat, lon); x east-ish
    /// along the grid, y north-ish. Handles lon given in any range (wrapped relative to
    /// lon0 into [-180,180)).
    ///
    /// With `dlambda = wrap(lon - lon0)` in radians:
    ///
    /// ```text
    /// Mercator       k0 = m(phi_ts)
    ///                x = a k0 dlambda,  y = -a k0 ln t(phi)                 (Snyder 7-6, 7-7)
    /// Polar (north)  rho = a m(phi_c) t(phi) / t(phi_c)                     (Snyder 21-34)
    ///                x = rho sin(dlambda),  y = -rho cos(dlambda)           (Snyder 21-30, 21-31)
    /// Polar (south)  as north with phi, phi_c negated, then y negated       (Snyder 21-34 note)
    /// Lambert        n = (ln m1 - ln m2) / (ln t1 - ln t2), or sin(phi1) if tangent (15-8)
    ///                F = m1 / (n t1^n),  rho = a F t(phi)^n                 (15-10, 15-7)
    ///                theta = n dlambda                                       (14-4)
    ///                x = rho sin(theta),  y = rho0 - rho cos(theta)         (14-1, 14-2)
    /// ```
    ///
    /// Mercator gives `y = +-inf` at the poles; the pole opposite a polar or Lambert
    /// projection's centre is at infinite distance too. NaN for invalid input.
    pub fn forward(&self, earth: &Earth, lat: f64, lon: f64) -> (f64, f64) {
        const NAN2: (f64, f64) = (f64::NAN, f64::NAN);
        let Some((a, e)) = earth.checked() else {
            return NAN2;
        };
        if !valid_lat(lat) || !lon.is_finite() {
            return NAN2;
        }
        match *self {
            Conformal::Mercator { lat_ts, lon0 } => {
                let Some(k0) = mercator_k0(e, lat_ts, lon0) else {
                    return NAN2;
                };
                let dlambda = wrap180(lon - lon0).to_radians();
                let (s, c) = sin_cos_deg(lat);
                (a * k0 * dlambda, a * k0 * isometric_latitude(e, s, c))
            }
            Conformal::PolarStereographic {
                north,
                lat_ts,
                lon0,
            } => {
                let Some(scale) = polar_constant(e, lat_ts, lon0) else {
                    return NAN2;
                };
                let hemi = if north { 1.0 } else { -1.0 };
                let (s, c) = sin_cos_deg(hemi * lat);
                let rho = a * scale * tsfn(e, s, c);
                let (sl, cl) = wrap180(lon - lon0).to_radians().sin_cos();
                (rho * sl, -hemi * rho * cl)
            }
            Conformal::Lambert {
                lat1,
                lat2,
                lat0,
                lon0,
            } => {
                let Some(cone) = lambert_cone(e, lat1, lat2, lat0, lon0) else {
                    return NAN2;
                };
                let (s, c) = sin_cos_deg(lat);
                let rho = a * cone.f * tsfn(e, s, c).powf(cone.n);
                let theta = cone.n * wrap180(lon - lon0).to_radians();
                let (st, ct) = theta.sin_cos();
                (rho * st, a * cone.rho0 - rho * ct)
            }
        }
    }

    /// Inverse of forward; returns lat in [-90,90], lon in [-180,180).
    ///
    /// ```text
    /// Mercator       t = exp(-y / (a k0)),  lambda = lon0 + x / (a k0)       (Snyder 7-10, 7-12)
    /// Polar (north)  rho = hypot(x, y),  t = rho t(phi_c) / (a m(phi_c)),
    ///                lambda = lon0 + atan2(x, -y)                            (Snyder 21-38, 21-40, 20-16)
    /// Lambert        rho = sign(n) hypot(x, rho0 - y),  t = (rho / (a F))^(1/n),
    ///                theta = atan2(sign(n) x, sign(n) (rho0 - y)),  lambda = lon0 + theta / n
    ///                                                                        (Snyder 14-10, 15-11, 14-11, 14-9)
    /// all            phi from t by phi = pi/2 - 2 atan(t ((1 - e sin phi)/(1 + e sin phi))^(e/2)),
    ///                iterated from phi = pi/2 - 2 atan(t)                   (Snyder 7-9)
    /// ```
    pub fn inverse(&self, earth: &Earth, x: f64, y: f64) -> (f64, f64) {
        const NAN2: (f64, f64) = (f64::NAN, f64::NAN);
        let Some((a, e)) = earth.checked() else {
            return NAN2;
        };
        if !x.is_finite() || !y.is_finite() {
            return NAN2;
        }
        match *self {
            Conformal::Mercator { lat_ts, lon0 } => {
                let Some(k0) = mercator_k0(e, lat_ts, lon0) else {
                    return NAN2;
                };
                let t = (-y / (a * k0)).exp();
                let lon = lon0 + (x / (a * k0)).to_degrees();
                (phi_from_t(e, t).to_degrees(), wrap180(lon))
            }
            Conformal::PolarStereographic {
                north,
                lat_ts,
                lon0,
            } => {
                let Some(scale) = polar_constant(e, lat_ts, lon0) else {
                    return NAN2;
                };
                let hemi = if north { 1.0 } else { -1.0 };
                let rho = x.hypot(y);
                let t = rho / (a * scale);
                let lat = hemi * phi_from_t(e, t).to_degrees();
                let dlambda = if rho == 0.0 {
                    0.0
                } else {
                    x.atan2(-hemi * y).to_degrees()
                };
                (lat, wrap180(lon0 + dlambda))
            }
            Conformal::Lambert {
                lat1,
                lat2,
                lat0,
                lon0,
            } => {
                let Some(cone) = lambert_cone(e, lat1, lat2, lat0, lon0) else {
                    return NAN2;
                };
                let sign = cone.n.signum();
                let dy = a * cone.rho0 - y;
                let rho = sign * x.hypot(dy);
                let t = (rho / (a * cone.f)).powf(1.0 / cone.n);
                let theta = if rho == 0.0 {
                    0.0
                } else {
                    (sign * x).atan2(sign * dy)
                };
                let lon = lon0 + (theta / cone.n).to_degrees();
                (phi_from_t(e, t).to_degrees(), wrap180(lon))
            }
        }
    }

    /// Map scale factor m (>0) at geographic latitude: ratio of map distance to earth
    /// distance (Snyder's k; h = k for conformal).
    ///
    /// ```text
    /// Mercator       k = m(phi_ts) / m(phi)                                  (Snyder 7-8)
    /// Polar (north)  k = rho / (a m(phi)) = [m(phi_c)/t(phi_c)] / [m(phi)/t(phi)]   (Snyder 21-32)
    /// Lambert        k = rho n / (a m(phi)) = n F t(phi)^n / m(phi)          (Snyder 15-4)
    /// ```
    ///
    /// `m/t` is evaluated as `(1 + sin phi) ((1 - e sin phi)/(1 + e sin phi))^(e/2) /
    /// sqrt(1 - e^2 sin^2 phi)`, which stays finite at the projection pole, so a polar
    /// stereographic k is exact there (`2 k0 / sqrt((1+e)^(1+e) (1-e)^(1-e))` form of
    /// Snyder 21-33 when `lat_ts = 90`). Mercator and Lambert give `+inf` at the poles.
    pub fn scale_factor(&self, earth: &Earth, lat: f64) -> f64 {
        let Some((_, e)) = earth.checked() else {
            return f64::NAN;
        };
        if !valid_lat(lat) {
            return f64::NAN;
        }
        match *self {
            Conformal::Mercator { lat_ts, lon0 } => {
                let Some(k0) = mercator_k0(e, lat_ts, lon0) else {
                    return f64::NAN;
                };
                let (s, c) = sin_cos_deg(lat);
                if c == 0.0 {
                    return f64::INFINITY;
                }
                k0 / msfn(e, s, c)
            }
            Conformal::PolarStereographic {
                north,
                lat_ts,
                lon0,
            } => {
                let Some(scale) = polar_constant(e, lat_ts, lon0) else {
                    return f64::NAN;
                };
                let hemi = if north { 1.0 } else { -1.0 };
                let (s, _) = sin_cos_deg(hemi * lat);
                scale / m_over_t(e, s)
            }
            Conformal::Lambert {
                lat1,
                lat2,
                lat0,
                lon0,
            } => {
                let Some(cone) = lambert_cone(e, lat1, lat2, lat0, lon0) else {
                    return f64::NAN;
                };
                let (s, c) = sin_cos_deg(lat);
                if c == 0.0 {
                    return f64::INFINITY;
                }
                cone.n * cone.f * tsfn(e, s, c).powf(cone.n) / msfn(e, s, c)
            }
        }
    }

    /// Angle in RADIANS, counter-clockwise, from local geographic east to the grid's +x axis
    /// at (lat, lon).
    ///
    /// A wind with grid components (ug, vg) has earth components
    ///   ue = ug*cos(alpha) - vg*sin(alpha),  ve = ug*sin(alpha) + vg*cos(alpha).
    ///
    /// With `dlambda = wrap(lon - lon0)` in radians: Mercator `alpha = 0`; polar
    /// stereographic north `alpha = -dlambda`, south `alpha = +dlambda`; Lambert
    /// `alpha = -n dlambda` in either hemisphere (n < 0 for a southern cone). This is minus
    /// the meridian convergence PROJ reports (`Proj.get_factors().meridian_convergence`).
    /// Exact on the ellipsoid too: meridians are straight lines through the apex, so the
    /// local east direction on the map is perpendicular to them.
    pub fn grid_rotation(&self, earth: &Earth, lat: f64, lon: f64) -> f64 {
        let Some((_, e)) = earth.checked() else {
            return f64::NAN;
        };
        if !valid_lat(lat) || !lon.is_finite() {
            return f64::NAN;
        }
        match *self {
            Conformal::Mercator { lat_ts, lon0 } => match mercator_k0(e, lat_ts, lon0) {
                Some(_) => 0.0,
                None => f64::NAN,
            },
            Conformal::PolarStereographic {
                north,
                lat_ts,
                lon0,
            } => {
                if polar_constant(e, lat_ts, lon0).is_none() {
                    return f64::NAN;
                }
                let dlambda = wrap180(lon - lon0).to_radians();
                if north {
                    -dlambda
                } else {
                    dlambda
                }
            }
            Conformal::Lambert {
                lat1,
                lat2,
                lat0,
                lon0,
            } => match lambert_cone(e, lat1, lat2, lat0, lon0) {
                Some(cone) => -cone.n * wrap180(lon - lon0).to_radians(),
                None => f64::NAN,
            },
        }
    }
}

/// Rotated latitude/longitude pole (GRIB2 template 3.1): latitude and longitude of the
/// southern pole of projection, and angle of rotation (degrees).
///
/// Convention (WMO Manual on Codes, template 3.1, as ecCodes and CF read it for a zero
/// angle): the rotated grid's south pole sits at geographic
/// `(south_pole_lat, south_pole_lon)`, the rotated origin `(0, 0)` at
/// `(south_pole_lat + 90, south_pole_lon)` (over the pole when that exceeds 90), and
/// rotated longitude increases eastward. In vectors, with `s = sin(south_pole_lat)`,
/// `c = cos(south_pole_lat)` and `Rz` a rotation about the polar axis,
///
/// ```text
/// r_geo = Rz(south_pole_lon) M r_rot,   M = [ -s  0  -c ]
///                                           [  0  1   0 ]
///                                           [  c  0  -s ]
/// ```
///
/// where `r = (cos lat cos lon, cos lat sin lon, sin lat)`. `M` takes the rotated south
/// pole `(0, 0, -1)` to the geographic direction of the given south pole.
///
/// **Angle of rotation.** A non-zero `angle` is applied as a rotation about the rotated
/// polar axis that shifts rotated longitude by `-angle`: `rlon = rlon_0 - angle`, where
/// `rlon_0` is the rotated longitude for a zero angle. The geographic north pole then sits
/// at rotated longitude `-angle`, which is what CF's `north_pole_grid_longitude` states, so
/// [`RotatedPole::cf_north_pole`] and PROJ agree with this type for any angle. ecCodes
/// (2.50, as observed) instead shifts the geographic longitude by `-angle`, a rotation about
/// the geographic axis; operational rotated grids use a zero angle, where all three agree.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RotatedPole {
    /// Geographic latitude of the rotated grid's south pole, degrees.
    pub south_pole_lat: f64,
    /// Geographic longitude of the rotated grid's south pole, degrees.
    pub south_pole_lon: f64,
    /// Angle of rotation, degrees (see the type's doc).
    pub angle: f64,
}

impl RotatedPole {
    /// Geographic (lat, lon) of the rotated point (rlat, rlon); lat in [-90,90],
    /// lon in [-180,180).
    // `&self` is the geometry interface's signature, shared with the conformal maps.
    #[allow(clippy::wrong_self_convention)]
    pub fn to_geographic(&self, rlat: f64, rlon: f64) -> (f64, f64) {
        let Some((s, c)) = self.checked() else {
            return (f64::NAN, f64::NAN);
        };
        if !valid_lat(rlat) || !rlon.is_finite() {
            return (f64::NAN, f64::NAN);
        }
        let r = unit_vector(rlat, wrap180(rlon + self.angle));
        let g = rotate_m(s, c, r);
        let lat = g[2].atan2(g[0].hypot(g[1])).to_degrees();
        let dlon = g[1].atan2(g[0]).to_degrees();
        (lat, wrap180(self.south_pole_lon + dlon))
    }

    /// Rotated (rlat, rlon) of the geographic point (lat, lon); rlat in [-90,90],
    /// rlon in [-180,180).
    // `&self` is the geometry interface's signature, shared with the conformal maps.
    #[allow(clippy::wrong_self_convention)]
    pub fn to_rotated(&self, lat: f64, lon: f64) -> (f64, f64) {
        let Some((s, c)) = self.checked() else {
            return (f64::NAN, f64::NAN);
        };
        if !valid_lat(lat) || !lon.is_finite() {
            return (f64::NAN, f64::NAN);
        }
        let g = unit_vector(lat, wrap180(lon - self.south_pole_lon));
        // M is orthogonal: its inverse is its transpose.
        let r = [-s * g[0] + c * g[2], g[1], -c * g[0] - s * g[2]];
        let rlat = r[2].atan2(r[0].hypot(r[1])).to_degrees();
        let rlon0 = r[1].atan2(r[0]).to_degrees();
        (rlat, wrap180(rlon0 - self.angle))
    }

    /// Angle in radians, counter-clockwise, from geographic east to rotated-grid east at the
    /// point given in rotated coordinates (same wind formula as [`Conformal::grid_rotation`]).
    ///
    /// Computed from vectors: the rotated-east unit vector `(-sin rlon_0, cos rlon_0, 0)` is
    /// carried by `M` into the geographic frame and `alpha = atan2(E . north, E . east)`
    /// with the local geographic unit vectors there. At the two geographic poles east is
    /// undefined and the (finite) value returned there has no meaning.
    pub fn grid_rotation(&self, rlat: f64, rlon: f64) -> f64 {
        let Some((s, c)) = self.checked() else {
            return f64::NAN;
        };
        if !valid_lat(rlat) || !rlon.is_finite() {
            return f64::NAN;
        }
        let rlon0 = wrap180(rlon + self.angle);
        let g = rotate_m(s, c, unit_vector(rlat, rlon0));
        let (sl, cl) = rlon0.to_radians().sin_cos();
        let east_rot = rotate_m(s, c, [-sl, cl, 0.0]);
        // Local geographic frame, relative to the meridian of south_pole_lon (Rz drops out).
        let lambda = g[1].atan2(g[0]);
        let (sin_lam, cos_lam) = lambda.sin_cos();
        let cos_phi = g[0].hypot(g[1]);
        let sin_phi = g[2];
        let east = [-sin_lam, cos_lam, 0.0];
        let north = [-sin_phi * cos_lam, -sin_phi * sin_lam, cos_phi];
        dot(east_rot, north).atan2(dot(east_rot, east))
    }

    /// CF rotated_latitude_longitude attributes: (grid_north_pole_latitude,
    /// grid_north_pole_longitude, north_pole_grid_longitude).
    ///
    /// `(-south_pole_lat, wrap(south_pole_lon - 180), wrap(-angle))` (CF 1.10 appendix F;
    /// the last is 0 for a zero angle, see the type's doc for a non-zero one).
    pub fn cf_north_pole(&self) -> (f64, f64, f64) {
        if self.checked().is_none() {
            return (f64::NAN, f64::NAN, f64::NAN);
        }
        (
            -self.south_pole_lat,
            wrap180(self.south_pole_lon - 180.0),
            wrap180(-self.angle),
        )
    }

    /// `(sin, cos)` of the south pole latitude when the parameters are usable.
    fn checked(&self) -> Option<(f64, f64)> {
        let ok = valid_lat(self.south_pole_lat)
            && self.south_pole_lon.is_finite()
            && self.angle.is_finite();
        ok.then(|| sin_cos_deg(self.south_pole_lat))
    }
}

/// Gaussian latitudes for a grid with `n` latitudes between a pole and the equator (GRIB2
/// template 3.40 "N"): 2n values in degrees, north to south, roots of the Legendre
/// polynomial P_2n (Newton iteration, converge to 1e-14).
///
/// With `N = 2n`, root `i` (1-based) starts from `mu = cos(pi (i - 1/4) / (N + 1/2))` and
/// Newton steps `mu -= P_N(mu) / P_N'(mu)` until the step is below 1e-14, where
/// `P_N` comes from Bonnet's recursion `(k+1) P_{k+1} = (2k+1) mu P_k - k P_{k-1}` and
/// `P_N' = N (mu P_N - P_{N-1}) / (mu^2 - 1)`. The southern half mirrors the northern one.
/// Returns an empty vector for `n == 0` or `n > 20 000`.
pub fn gaussian_latitudes(n: usize) -> Vec<f64> {
    if n == 0 || n > GAUSSIAN_MAX_N {
        return Vec::new();
    }
    let big_n = 2 * n;
    let mut lats = vec![0.0; big_n];
    for i in 0..n {
        let mut mu = (PI * (i as f64 + 0.75) / (big_n as f64 + 0.5)).cos();
        for _ in 0..GAUSSIAN_MAX_ITERATIONS {
            let (p, dp) = legendre_with_derivative(big_n, mu);
            let step = p / dp;
            if !step.is_finite() {
                break;
            }
            mu -= step;
            if step.abs() < GAUSSIAN_TOLERANCE {
                break;
            }
        }
        let lat = mu.clamp(-1.0, 1.0).asin().to_degrees();
        lats[i] = lat;
        lats[big_n - 1 - i] = -lat;
    }
    lats
}

/// `(P_n(mu), P_n'(mu))` by Bonnet's recursion; `n >= 1`, `|mu| < 1`.
fn legendre_with_derivative(n: usize, mu: f64) -> (f64, f64) {
    let mut p_prev = 1.0; // P_0
    let mut p = mu; // P_1
    for k in 1..n {
        let k = k as f64;
        let p_next = ((2.0 * k + 1.0) * mu * p - k * p_prev) / (k + 1.0);
        p_prev = p;
        p = p_next;
    }
    let dp = n as f64 * (mu * p - p_prev) / (mu * mu - 1.0);
    (p, dp)
}

/// Wraps degrees into `[-180, 180)`, leaving values already there untouched; NaN stays NaN.
fn wrap180(deg: f64) -> f64 {
    if (-180.0..180.0).contains(&deg) {
        return deg;
    }
    let w = (deg + 180.0).rem_euclid(360.0) - 180.0;
    // rem_euclid can round up to exactly 360 for tiny negative arguments.
    if w >= 180.0 {
        w - 360.0
    } else {
        w
    }
}

/// True for a finite latitude in `[-90, 90]`.
fn valid_lat(lat: f64) -> bool {
    lat.is_finite() && lat.abs() <= 90.0
}

/// `(sin, cos)` of a latitude in degrees, exact `(+-1, 0)` at the poles.
fn sin_cos_deg(lat: f64) -> (f64, f64) {
    if lat.abs() == 90.0 {
        (lat.signum(), 0.0)
    } else {
        lat.to_radians().sin_cos()
    }
}

/// `m(phi) = cos(phi) / sqrt(1 - e^2 sin^2(phi))` (Snyder 14-15).
fn msfn(e: f64, s: f64, c: f64) -> f64 {
    c / (1.0 - e * e * s * s).sqrt()
}

/// `t(phi)` (Snyder 15-9), with `tan(pi/4 - phi/2)` written `cos/(1 + sin)` or
/// `(1 - sin)/cos`, whichever is well conditioned: 0 at the north pole, +inf at the south.
fn tsfn(e: f64, s: f64, c: f64) -> f64 {
    let tan_half = if s >= 0.0 {
        c / (1.0 + s)
    } else {
        (1.0 - s) / c
    };
    tan_half * ((1.0 + e * s) / (1.0 - e * s)).powf(e / 2.0)
}

/// `m(phi)/t(phi) = (1 + sin) ((1 - e sin)/(1 + e sin))^(e/2) / sqrt(1 - e^2 sin^2)`,
/// from `tan(pi/4 - phi/2) = cos(phi)/(1 + sin(phi))`; finite at the north pole.
fn m_over_t(e: f64, s: f64) -> f64 {
    (1.0 + s) * ((1.0 - e * s) / (1.0 + e * s)).powf(e / 2.0) / (1.0 - e * e * s * s).sqrt()
}

/// Isometric latitude `psi = asinh(tan phi) - e atanh(e sin phi) = -ln t(phi)`
/// (Snyder 3-7 and 7-7 rearranged); `+-inf` at the poles.
fn isometric_latitude(e: f64, s: f64, c: f64) -> f64 {
    (s / c).asinh() - e * (e * s).atanh()
}

/// Latitude (radians) from `t` by Snyder's iteration 7-9; `t = 0` gives pi/2, `+inf` -pi/2.
fn phi_from_t(e: f64, t: f64) -> f64 {
    if t.is_nan() || t < 0.0 {
        return f64::NAN;
    }
    let half_e = e / 2.0;
    let mut phi = FRAC_PI_2 - 2.0 * t.atan();
    for _ in 0..PHI_MAX_ITERATIONS {
        let es = e * phi.sin();
        let next = FRAC_PI_2 - 2.0 * (t * ((1.0 - es) / (1.0 + es)).powf(half_e)).atan();
        let change = (next - phi).abs();
        phi = next;
        if change < PHI_TOLERANCE {
            break;
        }
    }
    phi
}

/// Mercator `k0 = m(phi_ts)` when the parameters are usable.
fn mercator_k0(e: f64, lat_ts: f64, lon0: f64) -> Option<f64> {
    if !valid_lat(lat_ts) || lat_ts.abs() == 90.0 || !lon0.is_finite() {
        return None;
    }
    let (s, c) = sin_cos_deg(lat_ts);
    Some(msfn(e, s, c))
}

/// Polar stereographic `m(phi_c)/t(phi_c)` with `phi_c = |lat_ts|` (hemisphere folded);
/// equals `2 k0 / sqrt((1+e)^(1+e) (1-e)^(1-e))` with `k0 = 1` when `phi_c = 90`
/// (Snyder 21-33).
fn polar_constant(e: f64, lat_ts: f64, lon0: f64) -> Option<f64> {
    if !valid_lat(lat_ts) || !lon0.is_finite() {
        return None;
    }
    let (s, _) = sin_cos_deg(lat_ts.abs());
    Some(m_over_t(e, s))
}

/// Lambert cone constants when the parameters are usable (Snyder 15-8, 15-10, 15-7).
fn lambert_cone(e: f64, lat1: f64, lat2: f64, lat0: f64, lon0: f64) -> Option<Cone> {
    let ok = valid_lat(lat1) && valid_lat(lat2) && valid_lat(lat0) && lon0.is_finite();
    if !ok || lat1.abs() == 90.0 || lat2.abs() == 90.0 {
        return None;
    }
    let (s1, c1) = sin_cos_deg(lat1);
    let (s2, c2) = sin_cos_deg(lat2);
    let (m1, t1) = (msfn(e, s1, c1), tsfn(e, s1, c1));
    let n = if (lat1 - lat2).to_radians().abs() < TANGENT_CONE {
        s1
    } else {
        let (m2, t2) = (msfn(e, s2, c2), tsfn(e, s2, c2));
        (m1.ln() - m2.ln()) / (t1.ln() - t2.ln())
    };
    if !n.is_finite() || n.abs() < TANGENT_CONE {
        return None;
    }
    let f = m1 / (n * t1.powf(n));
    let (s0, c0) = sin_cos_deg(lat0);
    let rho0 = f * tsfn(e, s0, c0).powf(n);
    (f.is_finite() && rho0.is_finite()).then_some(Cone { n, f, rho0 })
}

/// Unit vector of (lat, lon) in degrees.
fn unit_vector(lat: f64, lon: f64) -> [f64; 3] {
    let (sp, cp) = sin_cos_deg(lat);
    let (sl, cl) = lon.to_radians().sin_cos();
    [cp * cl, cp * sl, sp]
}

/// `M v` for the rotated-pole matrix (see [`RotatedPole`]).
fn rotate_m(s: f64, c: f64, v: [f64; 3]) -> [f64; 3] {
    [-s * v[0] - c * v[2], v[1], c * v[0] - s * v[2]]
}

fn dot(u: [f64; 3], v: [f64; 3]) -> f64 {
    u[0] * v[0] + u[1] * v[1] + u[2] * v[2]
}

#[cfg(test)]
mod tests {
    use super::*;

    /// GRIB2 code table 3.2 entry 6: sphere of radius 6 371 229 m.
    fn sphere() -> Earth {
        Earth::sphere(6_371_229.0)
    }

    /// WGS 84-like ellipsoid (a = 6 378 137 m, b = 6 356 752.314245 m).
    fn ellipsoid() -> Earth {
        Earth {
            a: 6_378_137.0,
            b: 6_356_752.314_245,
        }
    }

    /// The projections the tests exercise, one per kind and hemisphere.
    fn projections() -> Vec<(&'static str, Conformal)> {
        vec![
            (
                "mercator",
                Conformal::Mercator {
                    lat_ts: 20.0,
                    lon0: -120.0,
                },
            ),
            (
                "polar north",
                Conformal::PolarStereographic {
                    north: true,
                    lat_ts: 60.0,
                    lon0: -105.0,
                },
            ),
            (
                "polar south",
                Conformal::PolarStereographic {
                    north: false,
                    lat_ts: -60.0,
                    lon0: 100.0,
                },
            ),
            (
                "polar north, true at pole",
                Conformal::PolarStereographic {
                    north: true,
                    lat_ts: 90.0,
                    lon0: 0.0,
                },
            ),
            (
                "lambert secant",
                Conformal::Lambert {
                    lat1: 30.0,
                    lat2: 60.0,
                    lat0: 45.0,
                    lon0: 10.0,
                },
            ),
            (
                "lambert tangent",
                Conformal::Lambert {
                    lat1: 25.0,
                    lat2: 25.0,
                    lat0: 25.0,
                    lon0: -95.0,
                },
            ),
            (
                "lambert south",
                Conformal::Lambert {
                    lat1: -30.0,
                    lat2: -60.0,
                    lat0: -45.0,
                    lon0: 135.0,
                },
            ),
        ]
    }

    fn earths() -> [(&'static str, Earth); 2] {
        [("sphere", sphere()), ("ellipsoid", ellipsoid())]
    }

    /// Absolute longitude difference in degrees, across the date line.
    fn lon_diff(a: f64, b: f64) -> f64 {
        wrap180(a - b).abs()
    }

    /// Meridian radius of curvature M = a (1 - e^2) / (1 - e^2 sin^2 phi)^(3/2)
    /// (Snyder 1987 eq. 4-18; from memory).
    fn meridian_radius(earth: &Earth, lat: f64) -> f64 {
        let e = earth.eccentricity();
        let s = lat.to_radians().sin();
        earth.a * (1.0 - e * e) / (1.0 - e * e * s * s).powf(1.5)
    }

    /// Radius of the parallel, a m(phi) = N cos(phi) (Snyder 1987 eq. 4-21 and 14-15; from memory).
    fn parallel_radius(earth: &Earth, lat: f64) -> f64 {
        let e = earth.eccentricity();
        let (s, c) = lat.to_radians().sin_cos();
        earth.a * c / (1.0 - e * e * s * s).sqrt()
    }

    // ---------------------------------------------------------------- Earth

    #[test]
    fn earth_shape_constants() {
        let s = sphere();
        assert!(s.is_sphere());
        assert_eq!(s.eccentricity(), 0.0); // definition e = sqrt(1 - b^2/a^2)
        assert_eq!(s.mean_radius(), 6_371_229.0); // a sphere's own radius (definition)
        let w = ellipsoid();
        assert!(!w.is_sphere());
        // WGS 84 first eccentricity 0.0818191908426 (NIMA TR8350.2; from memory).
        assert!((w.eccentricity() - 0.081_819_190_842_6).abs() < 1e-12);
        // IUGG mean radius R1 of WGS 84, 6 371 008.771 m (Moritz 1980, Geodetic Reference
        // System 1980; from memory).
        assert!((w.mean_radius() - 6_371_008.771).abs() < 1e-3);
    }

    #[test]
    fn invalid_earth_gives_nan() {
        // Documented contract of this module: invalid figures give NaN.
        let prolate = Earth { a: 6.0e6, b: 6.1e6 };
        let zero = Earth::sphere(0.0);
        let inf = Earth::sphere(f64::INFINITY);
        for earth in [prolate, zero, inf] {
            assert!(earth.eccentricity().is_nan());
            assert!(earth.mean_radius().is_nan());
            for (name, p) in projections() {
                let (x, y) = p.forward(&earth, 45.0, 10.0);
                assert!(x.is_nan() && y.is_nan(), "{name}");
                let (lat, lon) = p.inverse(&earth, 1.0e5, 1.0e5);
                assert!(lat.is_nan() && lon.is_nan(), "{name}");
                assert!(p.scale_factor(&earth, 45.0).is_nan(), "{name}");
                assert!(p.grid_rotation(&earth, 45.0, 10.0).is_nan(), "{name}");
            }
        }
    }

    // ------------------------------------------------------- round trips

    #[test]
    fn conformal_round_trip() {
        // forward then inverse returns the point (definition of an inverse), to 1e-9 degree.
        let mut lats: Vec<f64> = (-8..=8).map(|i| f64::from(i) * 10.0 + 1.25).collect();
        lats.extend([-89.5, -85.0, 0.0, 85.0, 89.5]);
        let mut lons: Vec<f64> = (-15..15).map(|i| f64::from(i) * 12.0 + 0.5).collect();
        lons.extend([-180.0, 179.999, 359.0, -300.0, 725.5]);
        let mut checked = 0;
        for (ename, earth) in earths() {
            for (pname, p) in projections() {
                for &lat in &lats {
                    for &lon in &lons {
                        let (x, y) = p.forward(&earth, lat, lon);
                        assert!(
                            x.is_finite() && y.is_finite(),
                            "{pname} {ename} {lat} {lon}"
                        );
                        let (lat2, lon2) = p.inverse(&earth, x, y);
                        assert!(
                            (lat2 - lat).abs() < 1e-9,
                            "{pname} {ename} {lat} {lon}: {lat2}"
                        );
                        assert!(
                            lon_diff(lon2, lon) < 1e-9,
                            "{pname} {ename} {lat} {lon}: {lon2}"
                        );
                        assert!((-180.0..180.0).contains(&lon2));
                        checked += 1;
                    }
                }
            }
        }
        assert_eq!(checked, 2 * 7 * lats.len() * lons.len());
    }

    #[test]
    fn projection_poles_and_origins() {
        // Polar stereographic: the pole is the origin, rho = 0 (Snyder 1987 eq. 21-30..31;
        // from memory); Mercator and Lambert put (lat0, lon0) at (0, 0) by 14-1, 14-2, 7-6, 7-7.
        for (ename, earth) in earths() {
            let north = Conformal::PolarStereographic {
                north: true,
                lat_ts: 60.0,
                lon0: -105.0,
            };
            let (x, y) = north.forward(&earth, 90.0, 37.0);
            assert!(x.abs() < 1e-9 && y.abs() < 1e-9, "{ename}");
            let (lat, _) = north.inverse(&earth, 0.0, 0.0);
            assert_eq!(lat, 90.0, "{ename}");
            let south = Conformal::PolarStereographic {
                north: false,
                lat_ts: -71.0,
                lon0: 0.0,
            };
            let (lat, _) = south.inverse(&earth, 0.0, 0.0);
            assert_eq!(lat, -90.0, "{ename}");
            let lambert = Conformal::Lambert {
                lat1: 30.0,
                lat2: 60.0,
                lat0: 45.0,
                lon0: 10.0,
            };
            let (x, y) = lambert.forward(&earth, 45.0, 10.0);
            assert!(x.abs() < 1e-9 && y.abs() < 1e-6, "{ename}");
            // Mercator: the poles are at infinity (Snyder 1987 ch. 7; from memory).
            let merc = Conformal::Mercator {
                lat_ts: 0.0,
                lon0: 0.0,
            };
            assert_eq!(merc.forward(&earth, 90.0, 0.0).1, f64::INFINITY);
            assert_eq!(merc.forward(&earth, -90.0, 0.0).1, f64::NEG_INFINITY);
        }
    }

    // ------------------------------------------------- pyproj references

    /// (lat, lon, x, y) computed with pyproj 3.7.2 / PROJ 9.5.1 as `Proj(s)(lon, lat)`
    /// for the PROJ string `s` given beside each table. Each string is what
    /// `pyproj.CRS.from_cf` builds from the CF attributes of the same projection (checked
    /// to give identical x, y), with `+R=6371229` for the sphere and
    /// `+a=6378137 +b=6356752.314245` for the ellipsoid.
    struct Reference {
        proj: Conformal,
        earth: Earth,
        points: &'static [(f64, f64, f64, f64)],
    }

    fn pyproj_references() -> Vec<Reference> {
        let p = projections();
        let (merc, pn, ps, pn90, lcc2, lcc1, lccs) =
            (p[0].1, p[1].1, p[2].1, p[3].1, p[4].1, p[5].1, p[6].1);
        vec![
            // "+proj=merc +lat_ts=20 +lon_0=-120 +x_0=0 +y_0=0 +R=6371229"
            Reference {
                proj: merc,
                earth: sphere(),
                points: &[
                    (0.0, -120.0, 0.0, 0.0),
                    (25.5, -100.25, 2063732.9541277275, 2757155.067796687),
                    (-33.3, 150.0, -9404352.702354204, -3693865.795895092),
                    (60.0, -170.0, -5224640.390196783, 7884622.815551547),
                ],
            },
            // "+proj=merc +lat_ts=20 +lon_0=-120 +x_0=0 +y_0=0 +a=6378137 +b=6356752.314245"
            Reference {
                proj: merc,
                earth: ellipsoid(),
                points: &[
                    (0.0, -120.0, 0.0, 0.0),
                    (25.5, -100.25, 2066779.9546197727, 2743938.6903895857),
                    (-33.3, 150.0, -9418237.767887574, -3677267.8657597597),
                    (60.0, -170.0, -5232354.315493099, 7861444.842695906),
                ],
            },
            // "+proj=stere +lat_0=90 +lat_ts=60 +lon_0=-105 +x_0=0 +y_0=0 +R=6371229"
            Reference {
                proj: pn,
                earth: sphere(),
                points: &[
                    (60.0, -105.0, 0.0, -3185614.500000001),
                    (45.0, -60.0, 3482170.915830059, -3482170.915830057),
                    (20.0, 120.0, -5886437.688398563, 5886437.688398562),
                    (89.5, 0.0, 50107.72410317674, 13426.324208007713),
                ],
            },
            // "+proj=stere +lat_0=90 +lat_ts=60 +lon_0=-105 +x_0=0 +y_0=0 +a=6378137 +b=6356752.314245"
            Reference {
                proj: pn,
                earth: ellipsoid(),
                points: &[
                    (60.0, -105.0, 0.0, -3197104.5869239485),
                    (45.0, -60.0, 3490999.209542031, -3490999.209542029),
                    (20.0, 120.0, -5886928.362148961, 5886928.362148961),
                    (89.5, 0.0, 50333.83093683052, 13486.909351488399),
                ],
            },
            // "+proj=stere +lat_0=-90 +lat_ts=-60 +lon_0=100 +x_0=0 +y_0=0 +R=6371229"
            Reference {
                proj: ps,
                earth: sphere(),
                points: &[
                    (-60.0, 100.0, 0.0, 3185614.500000001),
                    (-45.0, -170.0, 4924533.33566801, 3.015406993410133e-10),
                    (-75.25, 30.5, -1441370.4448470594, 538906.3267905131),
                    (-20.0, 200.0, 8198209.418145588, -1445565.5139173106),
                ],
            },
            // "+proj=stere +lat_0=-90 +lat_ts=-60 +lon_0=100 +x_0=0 +y_0=0 +a=6378137 +b=6356752.314245"
            Reference {
                proj: ps,
                earth: ellipsoid(),
                points: &[
                    (-60.0, 100.0, 0.0, 3197104.5869239485),
                    (-45.0, -170.0, 4937018.428368093, 3.023051907816241e-10),
                    (-75.25, 30.5, -1447553.4199519083, 541218.0464558521),
                    (-20.0, 200.0, 8198892.79345247, -1445686.0114218637),
                ],
            },
            // "+proj=stere +lat_0=90 +lat_ts=90 +lon_0=0 +x_0=0 +y_0=0 +R=6371229"
            Reference {
                proj: pn90,
                earth: sphere(),
                points: &[
                    (80.0, 45.0, 788297.2205304794, -788297.2205304796),
                    (50.0, -135.0, -3279473.1621755506, 3279473.16217555),
                ],
            },
            // "+proj=stere +lat_0=90 +lat_ts=90 +lon_0=0 +x_0=0 +y_0=0 +a=6378137 +b=6356752.314245"
            Reference {
                proj: pn90,
                earth: ellipsoid(),
                points: &[
                    (80.0, 45.0, 791725.649969911, -791725.6499699111),
                    (50.0, -135.0, -3288891.04363198, 3288891.04363198),
                ],
            },
            // "+proj=lcc +lat_1=30 +lat_2=60 +lat_0=45 +lon_0=10 +x_0=0 +y_0=0 +R=6371229"
            Reference {
                proj: lcc2,
                earth: sphere(),
                points: &[
                    (45.0, 10.0, 0.0, 0.0),
                    (55.5, 30.25, 1237847.794396116, 1290291.651512769),
                    (35.0, -15.0, -2199470.690609556, -734031.7054336575),
                    (70.0, -170.0, -2571661.817731704, 8147882.979134709),
                ],
            },
            // "+proj=lcc +lat_1=30 +lat_2=60 +lat_0=45 +lon_0=10 +x_0=0 +y_0=0 +a=6378137 +b=6356752.314245"
            Reference {
                proj: lcc2,
                earth: ellipsoid(),
                points: &[
                    (45.0, 10.0, 0.0, 0.0),
                    (55.5, 30.25, 1242077.2072816924, 1291312.2090016915),
                    (35.0, -15.0, -2204444.441200909, -731722.9957145378),
                    (70.0, -170.0, -2580684.892564007, 8173185.407989583),
                ],
            },
            // "+proj=lcc +lat_1=25 +lat_2=25 +lat_0=25 +lon_0=-95 +x_0=0 +y_0=0 +R=6371229"
            Reference {
                proj: lcc1,
                earth: sphere(),
                points: &[
                    (25.0, -95.0, 0.0, 0.0),
                    (40.0, -70.0, 2195741.37613378, 1891056.1969894923),
                    (15.0, -130.0, -3773584.565574305, -627743.1729332096),
                    (50.0, 100.0, -10116823.953809667, 9927242.64213564),
                ],
            },
            // "+proj=lcc +lat_1=25 +lat_2=25 +lat_0=25 +lon_0=-95 +x_0=0 +y_0=0 +a=6378137 +b=6356752.314245"
            Reference {
                proj: lcc1,
                earth: ellipsoid(),
                points: &[
                    (25.0, -95.0, 0.0, 0.0),
                    (40.0, -70.0, 2200810.4814238218, 1886877.7363032883),
                    (15.0, -130.0, -3778183.839745578, -622162.3454344235),
                    (50.0, 100.0, -10143728.191657832, 9940306.220713677),
                ],
            },
            // "+proj=lcc +lat_1=-30 +lat_2=-60 +lat_0=-45 +lon_0=135 +x_0=0 +y_0=0 +R=6371229"
            Reference {
                proj: lccs,
                earth: sphere(),
                points: &[
                    (-45.0, 135.0, 0.0, 0.0),
                    (-30.0, 150.0, 1436082.1322499688, 1495901.9563311564),
                    (-60.5, 100.5, -1836125.6769436444, -2085663.33639599),
                    (-10.0, -160.0, 7310390.74549794, 854366.4532395079),
                ],
            },
            // "+proj=lcc +lat_1=-30 +lat_2=-60 +lat_0=-45 +lon_0=135 +x_0=0 +y_0=0 +a=6378137 +b=6356752.314245"
            Reference {
                proj: lccs,
                earth: ellipsoid(),
                points: &[
                    (-45.0, 135.0, 0.0, 0.0),
                    (-30.0, 150.0, 1438841.2700285038, 1492670.497813826),
                    (-60.5, 100.5, -1842766.5588921474, -2088534.5873060587),
                    (-10.0, -160.0, 7313036.17238189, 838577.7572433074),
                ],
            },
        ]
    }

    #[test]
    fn forward_matches_pyproj_to_a_millimetre() {
        // Reference: pyproj 3.7.2 / PROJ 9.5.1 (see `Reference`).
        for r in pyproj_references() {
            for &(lat, lon, x, y) in r.points {
                let (fx, fy) = r.proj.forward(&r.earth, lat, lon);
                assert!(
                    (fx - x).abs() < 1e-3 && (fy - y).abs() < 1e-3,
                    "{:?} {:?} ({lat}, {lon}): ({fx}, {fy}) vs pyproj ({x}, {y})",
                    r.proj,
                    r.earth
                );
            }
        }
    }

    #[test]
    fn inverse_matches_pyproj() {
        // Reference: pyproj 3.7.2 / PROJ 9.5.1 (see `Reference`): inverse of PROJ's (x, y)
        // must give PROJ's (lat, lon) to 1e-9 degree.
        for r in pyproj_references() {
            for &(lat, lon, x, y) in r.points {
                let (ilat, ilon) = r.proj.inverse(&r.earth, x, y);
                assert!(
                    (ilat - lat).abs() < 1e-9,
                    "{:?} ({lat}, {lon}): {ilat}",
                    r.proj
                );
                assert!(
                    lon_diff(ilon, lon) < 1e-9,
                    "{:?} ({lat}, {lon}): {ilon}",
                    r.proj
                );
            }
        }
    }

    // ----------------------------------------------------- scale factors

    #[test]
    fn scale_factor_is_one_on_standard_parallels() {
        // Definition of a standard parallel / latitude of true scale (Snyder 1987 ch. 7, 15,
        // 21; from memory).
        for (ename, earth) in earths() {
            let cases = [
                (projections()[0].1, 20.0),
                (projections()[0].1, -20.0),
                (projections()[1].1, 60.0),
                (projections()[2].1, -60.0),
                (projections()[3].1, 90.0),
                (projections()[4].1, 30.0),
                (projections()[4].1, 60.0),
                (projections()[5].1, 25.0),
                (projections()[6].1, -30.0),
                (projections()[6].1, -60.0),
            ];
            for (p, lat) in cases {
                let k = p.scale_factor(&earth, lat);
                assert!((k - 1.0).abs() < 1e-12, "{p:?} {ename} at {lat}: {k}");
            }
            // Between secant parallels the map shrinks, outside it grows (Snyder 1987 ch. 15;
            // from memory).
            let lcc2 = projections()[4].1;
            assert!(lcc2.scale_factor(&earth, 45.0) < 1.0);
            assert!(lcc2.scale_factor(&earth, 20.0) > 1.0);
        }
    }

    #[test]
    fn scale_factor_matches_numerical_estimate_from_forward() {
        // Closed form k against map distance / earth distance over +-1e-4 degree steps east
        // and north (definition of scale factor; conformal so both agree; Snyder 1987 ch. 4,
        // from memory). Earth distances from the parallel and meridian radii.
        let d = 1e-4;
        for (ename, earth) in earths() {
            for (pname, p) in projections() {
                for &(lat, lon) in &[
                    (50.0, 20.0),
                    (-40.0, 150.0),
                    (5.0, -60.0),
                    (75.0, -100.0),
                    (-70.0, 80.0),
                ] {
                    let k = p.scale_factor(&earth, lat);
                    let (xe1, ye1) = p.forward(&earth, lat, lon - d);
                    let (xe2, ye2) = p.forward(&earth, lat, lon + d);
                    let east = (xe2 - xe1).hypot(ye2 - ye1)
                        / (parallel_radius(&earth, lat) * (2.0 * d).to_radians());
                    let (xn1, yn1) = p.forward(&earth, lat - d, lon);
                    let (xn2, yn2) = p.forward(&earth, lat + d, lon);
                    let north = (xn2 - xn1).hypot(yn2 - yn1)
                        / (meridian_radius(&earth, lat) * (2.0 * d).to_radians());
                    assert!(
                        (east / k - 1.0).abs() < 1e-7,
                        "{pname} {ename} {lat}: k {k} east {east}"
                    );
                    assert!(
                        (north / k - 1.0).abs() < 1e-7,
                        "{pname} {ename} {lat}: k {k} north {north}"
                    );
                }
            }
        }
    }

    /// (lat, lon, parallel_scale, meridional_scale, meridian_convergence in degrees) from
    /// pyproj 3.7.2 / PROJ 9.5.1 `Proj(s).get_factors(lon, lat)` with the PROJ strings of
    /// `pyproj_references` (projections()[i] on the named earth).
    /// (projection index, earth, rows of (lat, lon, k, h, convergence)).
    type FactorTable = (usize, Earth, [(f64, f64, f64, f64, f64); 2]);

    fn pyproj_factors() -> Vec<FactorTable> {
        vec![
            (
                0,
                sphere(),
                [
                    (25.5, -100.25, 1.04111227723502, 1.0411122772585601, -0.0),
                    (-33.3, 150.0, 1.1242933051515762, 1.12429330518804, -0.0),
                ],
            ),
            (
                0,
                ellipsoid(),
                [
                    (25.5, -100.25, 1.0408738351972833, 1.0408738352210305, -0.0),
                    (-33.3, 150.0, 1.1235984263758882, 1.1235984264111079, -0.0),
                ],
            ),
            (
                1,
                sphere(),
                [
                    (
                        45.0,
                        -60.0,
                        1.0930923738161622,
                        1.0930923737625442,
                        45.00000000010287,
                    ),
                    (20.0, 120.0, 1.3904600561435332, 1.3904600560828884, -135.0),
                ],
            ),
            (
                1,
                ellipsoid(),
                [
                    (45.0, -60.0, 1.0928431902744735, 1.0928431902314724, 45.0),
                    (
                        20.0,
                        120.0,
                        1.3885258698929905,
                        1.3885258698165224,
                        -135.00000000008146,
                    ),
                ],
            ),
            (
                2,
                sphere(),
                [
                    (
                        -45.0,
                        -170.0,
                        1.093092373813016,
                        1.0930923737606513,
                        -90.00000000000001,
                    ),
                    (
                        -75.25,
                        30.5,
                        0.9486435303239765,
                        0.9486435302696539,
                        69.49999999997331,
                    ),
                ],
            ),
            (
                2,
                ellipsoid(),
                [
                    (-45.0, -170.0, 1.0928431902760978, 1.0928431902202633, -90.0),
                    (
                        -75.25,
                        30.5,
                        0.9486973738348415,
                        0.9486973737850464,
                        69.49999999999311,
                    ),
                ],
            ),
            (
                4,
                sphere(),
                [
                    (
                        55.5,
                        30.25,
                        0.980963989424866,
                        0.9809639894270263,
                        14.490228655348716,
                    ),
                    (
                        35.0,
                        -15.0,
                        0.9817305302856278,
                        0.9817305302750438,
                        -17.889171179502313,
                    ),
                ],
            ),
            (
                4,
                ellipsoid(),
                [
                    (
                        55.5,
                        30.25,
                        0.9810148433500849,
                        0.9810148433621529,
                        14.492339733276982,
                    ),
                    (
                        35.0,
                        -15.0,
                        0.9818066019635571,
                        0.981806601974822,
                        -17.89177744848508,
                    ),
                ],
            ),
            (
                5,
                sphere(),
                [
                    (
                        40.0,
                        -70.0,
                        1.0369330630500213,
                        1.0369330630702127,
                        10.565456543586244,
                    ),
                    (
                        15.0,
                        -130.0,
                        1.0150246521973436,
                        1.015024652206169,
                        -14.791639160917379,
                    ),
                ],
            ),
            (
                5,
                ellipsoid(),
                [
                    (
                        40.0,
                        -70.0,
                        1.0367644617130538,
                        1.0367644617367362,
                        10.565456543472257,
                    ),
                    (
                        15.0,
                        -130.0,
                        1.0149334403789874,
                        1.0149334403903125,
                        -14.791639160939443,
                    ),
                ],
            ),
            (
                6,
                sphere(),
                [
                    (
                        -30.0,
                        150.0,
                        1.0000000000014115,
                        0.9999999999779235,
                        -10.733502707752985,
                    ),
                    (
                        -60.5,
                        100.5,
                        1.0026879572075567,
                        1.0026879572242389,
                        24.687056227738065,
                    ),
                ],
            ),
            (
                6,
                ellipsoid(),
                [
                    (
                        -30.0,
                        150.0,
                        1.0000000000016742,
                        0.9999999999893757,
                        -10.735066469067103,
                    ),
                    (
                        -60.5,
                        100.5,
                        1.0026816631574405,
                        1.0026816631892617,
                        24.690652878869383,
                    ),
                ],
            ),
        ]
    }

    #[test]
    fn scale_factor_matches_pyproj_get_factors() {
        // Reference: pyproj 3.7.2 / PROJ 9.5.1 get_factors (numerical derivatives, good to
        // about 1e-10), both the parallel (k) and meridional (h) scales.
        let p = projections();
        for (i, earth, rows) in pyproj_factors() {
            for (lat, _lon, k_ref, h_ref, _) in rows {
                let k = p[i].1.scale_factor(&earth, lat);
                assert!((k - k_ref).abs() < 1e-9, "{} {lat}: {k} vs {k_ref}", p[i].0);
                assert!(
                    (k - h_ref).abs() < 1e-9,
                    "{} {lat}: {k} vs h {h_ref}",
                    p[i].0
                );
            }
        }
    }

    // ---------------------------------------------------- grid rotation

    #[test]
    fn grid_rotation_matches_numerical_east_step() {
        // The map direction of a small eastward step makes the angle -alpha with +x
        // (definition of alpha in the doc of `grid_rotation`; common practice).
        let d = 1e-5;
        let points = [
            (50.0, 20.0),
            (50.0, -150.0),
            (-40.0, 150.0),
            (-65.0, -20.0),
            (10.0, 95.0),
            (80.0, 179.0),
        ];
        for (ename, earth) in earths() {
            for (pname, p) in projections() {
                for &(lat, lon) in &points {
                    let (x1, y1) = p.forward(&earth, lat, lon - d);
                    let (x2, y2) = p.forward(&earth, lat, lon + d);
                    let numeric = -(y2 - y1).atan2(x2 - x1);
                    let alpha = p.grid_rotation(&earth, lat, lon);
                    let diff = (alpha - numeric + PI).rem_euclid(2.0 * PI) - PI;
                    assert!(
                        diff.abs() < 1e-8,
                        "{pname} {ename} ({lat}, {lon}): {alpha} vs {numeric}"
                    );
                }
            }
        }
    }

    #[test]
    fn grid_rotation_is_minus_pyproj_meridian_convergence() {
        // Reference: pyproj 3.7.2 / PROJ 9.5.1 get_factors().meridian_convergence, the angle
        // from true north to grid north, which is -alpha here.
        let p = projections();
        for (i, earth, rows) in pyproj_factors() {
            for (lat, lon, _, _, conv) in rows {
                let alpha = p[i].1.grid_rotation(&earth, lat, lon);
                let diff = wrap180(-alpha.to_degrees() - conv);
                assert!(
                    diff.abs() < 1e-8,
                    "{} ({lat}, {lon}): {alpha} vs {conv}",
                    p[i].0
                );
            }
        }
    }

    #[test]
    fn grid_y_wind_points_along_grid_y_on_the_earth() {
        // A grid wind (0, 1) rotated with ue = -vg sin(alpha), ve = vg cos(alpha) must point
        // where a small +y step of the map goes on the earth, measured through inverse()
        // (definition of grid-relative components, WMO GRIB2 flag table 3.3 bit 5; the
        // rotation formula is common practice).
        let d = 1.0;
        for (ename, earth) in earths() {
            for (pname, p) in projections() {
                for &(lat, lon) in &[(50.0, 20.0), (-40.0, 150.0), (30.0, -75.0), (-70.0, -10.0)] {
                    let (x, y) = p.forward(&earth, lat, lon);
                    let (lat1, lon1) = p.inverse(&earth, x, y - d);
                    let (lat2, lon2) = p.inverse(&earth, x, y + d);
                    let east = parallel_radius(&earth, lat) * wrap180(lon2 - lon1).to_radians();
                    let north = meridian_radius(&earth, lat) * (lat2 - lat1).to_radians();
                    let alpha = p.grid_rotation(&earth, lat, lon);
                    let (ue, ve) = (-alpha.sin(), alpha.cos());
                    let expected = north.atan2(east);
                    let got = ve.atan2(ue);
                    let diff = (got - expected + PI).rem_euclid(2.0 * PI) - PI;
                    assert!(
                        diff.abs() < 1e-6,
                        "{pname} {ename} ({lat}, {lon}): {got} vs {expected}"
                    );
                }
            }
        }
    }

    // ----------------------------------------------------- rotated pole

    #[test]
    fn rotated_origin_and_equator() {
        // WMO GRIB2 template 3.1 (from memory): the rotated origin lies 90 degrees north of
        // the rotated south pole on its meridian; rotated (0, 90) lies on the geographic
        // equator 90 degrees east of that meridian (geometry of the rotation).
        let rp = RotatedPole {
            south_pole_lat: -30.0,
            south_pole_lon: 15.0,
            angle: 0.0,
        };
        let (lat, lon) = rp.to_geographic(0.0, 0.0);
        assert!((lat - 60.0).abs() < 1e-12 && (lon - 15.0).abs() < 1e-12);
        let (lat, lon) = rp.to_geographic(0.0, 90.0);
        assert!(lat.abs() < 1e-12 && (lon - 105.0).abs() < 1e-12);
        let (lat, lon) = rp.to_geographic(-90.0, 0.0);
        assert!((lat + 30.0).abs() < 1e-12 && (lon - 15.0).abs() < 1e-12);
        // A south pole at geographic -90, 0 is no rotation at all (same convention).
        let none = RotatedPole {
            south_pole_lat: -90.0,
            south_pole_lon: 0.0,
            angle: 0.0,
        };
        for &(a, b) in &[(12.5, -33.0), (-60.0, 170.0), (0.0, 0.0)] {
            let (lat, lon) = none.to_geographic(a, b);
            assert!((lat - a).abs() < 1e-12 && lon_diff(lon, b) < 1e-12);
            assert!(none.grid_rotation(a, b).abs() < 1e-12);
        }
    }

    #[test]
    fn rotated_cf_attributes() {
        // CF 1.10 appendix F rotated_latitude_longitude: the grid north pole is antipodal to
        // the GRIB2 southern pole; north_pole_grid_longitude is 0 for a zero angle.
        let rp = RotatedPole {
            south_pole_lat: -30.0,
            south_pole_lon: 15.0,
            angle: 0.0,
        };
        assert_eq!(rp.cf_north_pole(), (30.0, -165.0, 0.0));
        let rp = RotatedPole {
            south_pole_lat: -40.0,
            south_pole_lon: 190.0,
            angle: 0.0,
        };
        assert_eq!(rp.cf_north_pole(), (40.0, 10.0, 0.0));
        // Non-zero angle: this module's documented convention, confirmed against PROJ in
        // `rotated_matches_pyproj_ob_tran`.
        let rp = RotatedPole {
            south_pole_lat: -30.0,
            south_pole_lon: 15.0,
            angle: 20.0,
        };
        assert_eq!(rp.cf_north_pole(), (30.0, -165.0, -20.0));
    }

    #[test]
    fn rotated_matches_pyproj_ob_tran() {
        // Reference: pyproj 3.7.2 / PROJ 9.5.1, Transformer from
        // CRS.from_cf(rotated_latitude_longitude attributes = cf_north_pole() of each pole
        // below, earth_radius 6371229) to "+proj=longlat +R=6371229"; the CRS is the PROJ
        // string quoted. Rows: (rlat, rlon, lat, lon).
        type Case = (RotatedPole, &'static str, [(f64, f64, f64, f64); 4]);
        let cases: [Case; 4] = [
            (
                RotatedPole {
                    south_pole_lat: -30.0,
                    south_pole_lon: 15.0,
                    angle: 0.0,
                },
                "+proj=ob_tran +o_proj=longlat +o_lon_p=0 +o_lat_p=30 +lon_0=15 +R=6371229",
                [
                    (0.0, 0.0, 60.00000000000001, 14.999999999999998),
                    (10.0, -20.0, 62.6552019069389, -32.161375412946654),
                    (-35.5, 42.25, 13.38748431888825, 49.24093127125154),
                    (75.0, 170.0, 15.2020849155852, -167.6694130385477),
                ],
            ),
            (
                RotatedPole {
                    south_pole_lat: -40.0,
                    south_pole_lon: 10.0,
                    angle: 0.0,
                },
                "+proj=ob_tran +o_proj=longlat +o_lon_p=0 +o_lat_p=40 +lon_0=10 +R=6371229",
                [
                    (0.0, 0.0, 50.0, 10.0),
                    (10.0, -20.0, 55.13779627047714, -26.1045492986451),
                    (-35.5, 42.25, 5.069690896720649, 43.33505315982124),
                    (75.0, 170.0, 25.190571017848978, -172.84687636580222),
                ],
            ),
            (
                RotatedPole {
                    south_pole_lat: -30.0,
                    south_pole_lon: 15.0,
                    angle: 20.0,
                },
                "+proj=ob_tran +o_proj=longlat +o_lon_p=-20 +o_lat_p=30 +lon_0=15 +R=6371229",
                [
                    (0.0, 0.0, 54.468652237195826, 51.05238873238791),
                    (10.0, -20.0, 70.00000000000001, 14.999999999999998),
                    (-35.5, 42.25, 2.173611683183422, 61.13718153738446),
                    (75.0, 170.0, 15.2020849155852, -162.33058696145224),
                ],
            ),
            (
                RotatedPole {
                    south_pole_lat: 25.0,
                    south_pole_lon: -120.0,
                    angle: 0.0,
                },
                "+proj=ob_tran +o_proj=longlat +o_lon_p=0 +o_lat_p=-25 +lon_0=240 +R=6371229",
                [
                    (0.0, 0.0, 65.0, 59.99999999999993),
                    (10.0, -20.0, 49.93594619224457, 91.55443341440679),
                    (-35.5, 42.25, 52.33319069362021, -56.39094611819738),
                    (75.0, 170.0, -39.733977105873805, 56.649584720864596),
                ],
            ),
        ];
        for (rp, proj, rows) in cases {
            for (rlat, rlon, lat, lon) in rows {
                let (glat, glon) = rp.to_geographic(rlat, rlon);
                assert!(
                    (glat - lat).abs() < 1e-8 && lon_diff(glon, lon) < 1e-8,
                    "{proj} ({rlat}, {rlon}): ({glat}, {glon})"
                );
                let (qlat, qlon) = rp.to_rotated(lat, lon);
                assert!(
                    (qlat - rlat).abs() < 1e-8 && lon_diff(qlon, rlon) < 1e-8,
                    "{proj} ({lat}, {lon}): ({qlat}, {qlon})"
                );
            }
        }
    }

    #[test]
    fn rotated_round_trip() {
        // to_rotated(to_geographic(p)) == p (definition of an inverse), to 1e-9 degree.
        let poles = [
            (-30.0, 15.0, 0.0),
            (-40.0, 10.0, 0.0),
            (25.0, -120.0, 0.0),
            (-30.0, 15.0, 20.0),
            (-89.0, 400.0, -7.5),
        ];
        for (spl, spn, angle) in poles {
            let rp = RotatedPole {
                south_pole_lat: spl,
                south_pole_lon: spn,
                angle,
            };
            for i in -8..=8 {
                for j in -12..12 {
                    let (rlat, rlon) = (f64::from(i) * 10.5, f64::from(j) * 15.0 + 0.25);
                    let (lat, lon) = rp.to_geographic(rlat, rlon);
                    assert!((-90.0..=90.0).contains(&lat) && (-180.0..180.0).contains(&lon));
                    let (rlat2, rlon2) = rp.to_rotated(lat, lon);
                    assert!(
                        (rlat2 - rlat).abs() < 1e-9,
                        "{rp:?} ({rlat}, {rlon}): {rlat2}"
                    );
                    assert!(
                        lon_diff(rlon2, rlon) < 1e-9,
                        "{rp:?} ({rlat}, {rlon}): {rlon2}"
                    );
                }
            }
        }
    }

    #[test]
    fn rotated_grid_rotation_matches_numerical_east_step() {
        // A small step along rotated east, seen on the earth, makes the angle alpha with
        // geographic east (definition of alpha in the doc of `grid_rotation`; common practice).
        let d = 1e-5;
        let poles = [(-30.0, 15.0, 0.0), (25.0, -120.0, 0.0), (-30.0, 15.0, 20.0)];
        for (spl, spn, angle) in poles {
            let rp = RotatedPole {
                south_pole_lat: spl,
                south_pole_lon: spn,
                angle,
            };
            for &(rlat, rlon) in &[
                (0.0, 0.0),
                (20.0, -30.0),
                (-45.0, 60.0),
                (70.0, 150.0),
                (-10.0, -170.0),
            ] {
                let (lat1, lon1) = rp.to_geographic(rlat, rlon - d);
                let (lat2, lon2) = rp.to_geographic(rlat, rlon + d);
                let (lat, _) = rp.to_geographic(rlat, rlon);
                let east = lat.to_radians().cos() * wrap180(lon2 - lon1);
                let north = lat2 - lat1;
                let numeric = north.atan2(east);
                let alpha = rp.grid_rotation(rlat, rlon);
                let diff = (alpha - numeric + PI).rem_euclid(2.0 * PI) - PI;
                assert!(
                    diff.abs() < 1e-7,
                    "{rp:?} ({rlat}, {rlon}): {alpha} vs {numeric}"
                );
            }
        }
    }

    // -------------------------------------------------- Gaussian latitudes

    #[test]
    fn gaussian_n1_and_n2_closed_forms() {
        // Roots of P2: mu = +-1/sqrt(3); of P4: mu^2 = (3 +- 2 sqrt(6/5)) / 7 (Legendre
        // polynomials, e.g. Abramowitz and Stegun table 25.4; from memory).
        let g1 = gaussian_latitudes(1);
        let mu = (1.0 / 3.0_f64.sqrt()).asin().to_degrees();
        assert_eq!(g1.len(), 2);
        assert!(
            (g1[0] - mu).abs() < 1e-12 && (g1[1] + mu).abs() < 1e-12,
            "{g1:?}"
        );
        assert!((g1[0] - 35.2644).abs() < 1e-4); // 35.2644 degrees, from memory
        let g2 = gaussian_latitudes(2);
        let r = 2.0 * (6.0_f64 / 5.0).sqrt();
        let outer = ((3.0 + r) / 7.0).sqrt().asin().to_degrees();
        let inner = ((3.0 - r) / 7.0).sqrt().asin().to_degrees();
        let expected = [outer, inner, -inner, -outer];
        assert_eq!(g2.len(), 4);
        for (g, e) in g2.iter().zip(expected) {
            assert!((g - e).abs() < 1e-12, "{g2:?}");
        }
    }

    #[test]
    fn gaussian_f48() {
        // N = 48 (96 latitudes). First latitude 88.5721685 degrees (from memory); all four
        // values below also computed with numpy 2.4.6
        // numpy.degrees(numpy.arcsin(numpy.polynomial.legendre.leggauss(96)[0]))[::-1].
        let g = gaussian_latitudes(48);
        assert_eq!(g.len(), 96);
        assert!((g[0] - 88.5721685).abs() < 1e-7);
        let numpy = [
            (0, 88.57216851400727),
            (1, 86.72253095466814),
            (47, 0.9326299678380044),
            (95, -88.57216851400727),
        ];
        for (i, v) in numpy {
            assert!((g[i] - v).abs() < 1e-10, "{i}: {} vs {v}", g[i]);
        }
        // North to south, symmetric about the equator (this function's contract; Legendre
        // polynomials of even degree are even functions).
        assert!(g.windows(2).all(|w| w[0] > w[1]));
        for i in 0..48 {
            assert_eq!(g[i], -g[95 - i]);
        }
    }

    #[test]
    fn gaussian_n320_matches_numpy() {
        // Reference: numpy 2.4.6 numpy.polynomial.legendre.leggauss(640), latitudes as in
        // `gaussian_f48`; indices 0, 1 and n - 1 (the row nearest the equator).
        let g = gaussian_latitudes(320);
        assert_eq!(g.len(), 640);
        let numpy = [
            (0, 89.78487690721863),
            (1, 89.50620273820637),
            (319, 0.1405151796675032),
        ];
        for (i, v) in numpy {
            assert!((g[i] - v).abs() < 1e-10, "{i}: {} vs {v}", g[i]);
        }
    }

    #[test]
    fn gaussian_degenerate_sizes() {
        // Documented contract: n == 0 or n beyond the cap gives an empty vector, no panic.
        assert!(gaussian_latitudes(0).is_empty());
        assert!(gaussian_latitudes(usize::MAX).is_empty());
        assert!(gaussian_latitudes(GAUSSIAN_MAX_N + 1).is_empty());
    }

    #[test]
    fn polar_true_scale_sign_follows_the_pole() {
        // This module's documented convention: the GRIB2 projection centre flag (`north`)
        // picks the hemisphere and |lat_ts| is mirrored into it. The south pole values are
        // pyproj's "+proj=stere +lat_0=-90 +lat_ts=-60 +lon_0=100" rows of
        // `pyproj_references`.
        for r in pyproj_references()
            .into_iter()
            .filter(|r| r.proj == projections()[2].1)
        {
            let flipped = Conformal::PolarStereographic {
                north: false,
                lat_ts: 60.0,
                lon0: 100.0,
            };
            for &(lat, lon, x, y) in r.points {
                let (fx, fy) = flipped.forward(&r.earth, lat, lon);
                assert!((fx - x).abs() < 1e-3 && (fy - y).abs() < 1e-3);
            }
        }
    }

    #[test]
    fn lambert_parallels_in_either_order() {
        // The secant cone depends on the pair of standard parallels, not their order
        // (Snyder 1987 eq. 15-8 is symmetric in phi1, phi2; from memory).
        let a = projections()[4].1;
        let b = Conformal::Lambert {
            lat1: 60.0,
            lat2: 30.0,
            lat0: 45.0,
            lon0: 10.0,
        };
        for (ename, earth) in earths() {
            let (xa, ya) = a.forward(&earth, 52.0, 21.0);
            let (xb, yb) = b.forward(&earth, 52.0, 21.0);
            assert!((xa - xb).abs() < 1e-6 && (ya - yb).abs() < 1e-6, "{ename}");
        }
    }

    // ------------------------------------------------------ bad input

    #[test]
    fn non_finite_and_out_of_range_input_gives_nan() {
        // Documented contract of this module.
        let bad = [f64::NAN, f64::INFINITY, f64::NEG_INFINITY];
        for (ename, earth) in earths() {
            for (pname, p) in projections() {
                for &b in &bad {
                    let f = p.forward(&earth, b, 10.0);
                    assert!(f.0.is_nan() && f.1.is_nan(), "{pname} {ename}");
                    let f = p.forward(&earth, 10.0, b);
                    assert!(f.0.is_nan() && f.1.is_nan(), "{pname} {ename}");
                    let i = p.inverse(&earth, b, 0.0);
                    assert!(i.0.is_nan() && i.1.is_nan(), "{pname} {ename}");
                    let i = p.inverse(&earth, 0.0, b);
                    assert!(i.0.is_nan() && i.1.is_nan(), "{pname} {ename}");
                    assert!(p.scale_factor(&earth, b).is_nan(), "{pname} {ename}");
                    assert!(p.grid_rotation(&earth, b, 0.0).is_nan(), "{pname} {ename}");
                    assert!(p.grid_rotation(&earth, 0.0, b).is_nan(), "{pname} {ename}");
                }
                let f = p.forward(&earth, 90.5, 0.0);
                assert!(f.0.is_nan() && f.1.is_nan(), "{pname} {ename}");
                assert!(p.scale_factor(&earth, -91.0).is_nan(), "{pname} {ename}");
            }
            let unusable = [
                Conformal::Mercator {
                    lat_ts: 90.0,
                    lon0: 0.0,
                },
                Conformal::Mercator {
                    lat_ts: 10.0,
                    lon0: f64::NAN,
                },
                Conformal::PolarStereographic {
                    north: true,
                    lat_ts: 100.0,
                    lon0: 0.0,
                },
                Conformal::Lambert {
                    lat1: 30.0,
                    lat2: -30.0,
                    lat0: 0.0,
                    lon0: 0.0,
                },
                Conformal::Lambert {
                    lat1: 90.0,
                    lat2: 60.0,
                    lat0: 45.0,
                    lon0: 0.0,
                },
                Conformal::Lambert {
                    lat1: 30.0,
                    lat2: 60.0,
                    lat0: f64::INFINITY,
                    lon0: 0.0,
                },
            ];
            for p in unusable {
                let f = p.forward(&earth, 45.0, 0.0);
                assert!(f.0.is_nan() && f.1.is_nan(), "{p:?} {ename}");
                let i = p.inverse(&earth, 0.0, 0.0);
                assert!(i.0.is_nan() && i.1.is_nan(), "{p:?} {ename}");
                assert!(p.scale_factor(&earth, 45.0).is_nan(), "{p:?} {ename}");
                assert!(p.grid_rotation(&earth, 45.0, 0.0).is_nan(), "{p:?} {ename}");
            }
        }
        let rp = RotatedPole {
            south_pole_lat: -30.0,
            south_pole_lon: 15.0,
            angle: 0.0,
        };
        for &b in &bad {
            let g = rp.to_geographic(b, 0.0);
            assert!(g.0.is_nan() && g.1.is_nan());
            let g = rp.to_rotated(0.0, b);
            assert!(g.0.is_nan() && g.1.is_nan());
            assert!(rp.grid_rotation(b, 0.0).is_nan());
            let broken = RotatedPole { angle: b, ..rp };
            assert!(broken.to_geographic(0.0, 0.0).0.is_nan());
            let c = broken.cf_north_pole();
            assert!(c.0.is_nan() && c.1.is_nan() && c.2.is_nan());
        }
    }

    #[test]
    fn longitude_is_wrapped_relative_to_the_central_meridian() {
        // Longitudes differing by whole turns are the same meridian (common practice).
        for (ename, earth) in earths() {
            for (pname, p) in projections() {
                let a = p.forward(&earth, 35.0, -170.0);
                for shift in [360.0, -360.0, 720.0] {
                    let b = p.forward(&earth, 35.0, -170.0 + shift);
                    assert!(
                        (a.0 - b.0).abs() < 1e-6 && (a.1 - b.1).abs() < 1e-6,
                        "{pname} {ename}"
                    );
                }
            }
        }
        assert_eq!(wrap180(180.0), -180.0); // [-180, 180) by the module's contract
        assert_eq!(wrap180(-1e-300), -1e-300);
        assert!((-180.0..180.0).contains(&wrap180(-360.0 - 1e-14)));
        assert_eq!(wrap180(540.0), -180.0);
    }
}
