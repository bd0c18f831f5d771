//! Which quicklook images a step gets and where they go.
//!
//! In: a step's products as written (fields on the model grid, coordinates)
//! and the configured list of images, each `variable` or `variable@level`
//! (the level in the variable's own vertical coordinate: hPa on isobaric
//! levels, K on isentropic surfaces, PVU on PV surfaces, `bottom-top` for
//! layers). Out: PNG files beside the NetCDF file, `<stem>_<variable>[_<level>].png`,
//! each written under a hidden name, fsynced and renamed into place. A
//! variable the step does not have is passed over; an image never stops a
//! step. Each image gets its product's fixed scale ([`super::scales`]), the
//! land outline the settings ask for, and on PV and tropopause maps the
//! 2 PVU line. The images are guidance for trained forecasters, not warnings.

use std::path::{Path, PathBuf};

use std::borrow::Cow;

use ndarray::{Array2, ArrayView2};
use rayon::prelude::*;
use tracing::{debug, warn};

use super::cf::{Product, StepProducts, Vertical};
use super::quicklook::{self, render_on, Backdrop, Contour, Outline, Quicklook, Scale};
use super::scales;
use crate::config::settings::{OutlineKind, Quicklooks};

/// One image asked for.
#[derive(Debug, Clone, PartialEq)]
pub struct Wanted {
    /// Variable name.
    pub variable: String,
    /// Level: one value, or a layer (bottom, top).
    pub level: Option<(f64, Option<f64>)>,
}

/// Parse `variable` or `variable@level` or `variable@bottom-top`.
pub fn parse(spec: &str) -> Result<Wanted, String> {
    let (v, l) = match spec.split_once('@') {
        Some((v, l)) => (v.trim(), Some(l.trim())),
        None => (spec.trim(), None),
    };
    if v.is_empty() || !v.chars().all(|c| c.is_ascii_alphanumeric() || c == '_') {
        return Err(format!("{spec:?}: not a variable name"));
    }
    let level = match l {
        None => None,
        Some(l) => {
            let num = |s: &str| {
                s.trim()
                    .parse::<f64>()
                    .map_err(|_| format!("{spec:?}: level {s:?} is not a number"))
            };
            // A leading minus is a negative value (a southern PV surface), not a layer.
            match l.get(1..).and_then(|r| r.find('-')).map(|k| k + 1) {
                Some(k) => Some((num(&l[..k])?, Some(num(&l[k + 1..])?))),
                None => Some((num(l)?, None)),
            }
        }
    };
    Ok(Wanted {
        variable: v.to_string(),
        level,
    })
}

fn level_index(
    p: &StepProducts,
    f: &Product,
    level: Option<(f64, Option<f64>)>,
) -> Option<(usize, String)> {
    let close = |a: f64, b: f64| (a - b).abs() <= 1e-6 * a.abs().max(1.0);
    let n = f.dim().0;
    match level {
        None => (n == 1).then(|| (0, String::new())),
        Some((v, None)) => match f.vertical {
            Vertical::Pressure => p
                .levels
                .iter()
                .position(|x| close(*x, v * 100.0))
                .map(|k| (k, format!("{v} hPa"))),
            Vertical::Theta => p
                .theta_levels
                .iter()
                .position(|x| close(*x, v))
                .map(|k| (k, format!("{v} K"))),
            Vertical::PvSurface => p
                .pv_levels
                .iter()
                .position(|x| close(*x, v.abs()))
                .map(|k| (k, format!("{} PVU", v.abs()))),
            _ => None,
        },
        Some((b, Some(t))) => match f.vertical {
            Vertical::PressureLayer => p
                .p_layers
                .iter()
                .position(|l| close(l[0], b * 100.0) && close(l[1], t * 100.0))
                .map(|k| (k, format!("{b}-{t} hPa"))),
            Vertical::ThetaLayer => p
                .layers
                .iter()
                .position(|l| close(l[0], b) && close(l[1], t))
                .map(|k| (k, format!("{b}-{t} K"))),
            _ => None,
        },
    }
}

/// A budget variable that the PV budget added to the published file after
/// the step's own products were written, read back as a product.
fn added_later(product: &Path, name: &str) -> Option<Product> {
    let (spec, vertical) = super::variables::budget::find(name)?;
    let (_, data) = super::store::read_field(product, name)?;
    Some(Product::new(spec, vertical, data))
}

/// What the images of a step are drawn with besides the step's products.
#[derive(Debug, Clone, Copy)]
pub struct Look<'a> {
    /// The `[quicklook]` settings.
    pub settings: &'a Quicklooks,
    /// The model's terrain height (m) on the grid, where the input has it.
    pub terrain: Option<ArrayView2<'a, f32>>,
}

/// The level of an image entry as written in `[quicklook]` (`500`,
/// `1000-500`, `320`, `2`), to look up its scale.
fn level_key(level: Option<(f64, Option<f64>)>) -> String {
    match level {
        None => String::new(),
        Some((v, None)) => format!("{}", v.abs()),
        Some((b, Some(t))) => format!("{b}-{t}"),
    }
}

/// The scale of an image: the configured one (by `variable@level`, then by
/// `variable`), else the product's default, else one spanning the values.
/// The flag says the scale came from the values.
pub fn scale_of(
    look: &Look<'_>,
    name: &str,
    level: &str,
    values: &ArrayView2<'_, f32>,
) -> (Scale, bool) {
    let s = look.settings;
    let configured = s
        .scales
        .get(&format!("{name}@{level}"))
        .or_else(|| s.scales.get(name));
    if let Some(c) = configured {
        let base = scales::default_scale(name, level)
            .unwrap_or_else(|| Scale::fixed(scales::fallback_palette(name), 0.0, 1.0, 0.1));
        let (min, max) = (c[0], c[1]);
        let step = c
            .get(2)
            .copied()
            .unwrap_or_else(|| quicklook::band_step(max - min));
        return (
            Scale {
                min,
                max,
                step,
                ..base
            },
            false,
        );
    }
    match scales::default_scale(name, level) {
        Some(d) => (d, false),
        None => (
            Scale::spanning(values, scales::fallback_palette(name)),
            true,
        ),
    }
}

/// A field with its sign reversed south of the equator (PV: the stratosphere
/// high in both hemispheres); and whether any point was south.
fn by_magnitude(v: &Array2<f32>, lat: &Array2<f64>) -> (Array2<f32>, bool) {
    let mut south = false;
    let mut out = v.clone();
    ndarray::Zip::from(&mut out).and(lat).for_each(|x, &la| {
        if la < 0.0 {
            *x = -*x;
            south = true;
        }
    });
    (out, south)
}

/// The isentropic PV of the step on `theta` K, in PVU, sign reversed south of
/// the equator: the field whose 2 PVU contour goes on tropopause maps.
fn isentropic_pv_pvu(p: &StepProducts, theta: f64) -> Option<Array2<f32>> {
    let f = p.fields.iter().find(|f| f.spec.name == "isen_pv")?;
    let k = p
        .theta_levels
        .iter()
        .position(|x| (x - theta).abs() < 1e-6)?;
    let factor = scales::shown_units(f.spec.units).factor as f32;
    let v = f.level(k).mapv(|x| x * factor);
    Some(by_magnitude(&v, &p.lat).0)
}

/// Write the asked images of a step beside `product`. Returns the images written.
pub fn write_images(
    product: &Path,
    p: &StepProducts,
    wanted: &[Wanted],
    look: &Look<'_>,
) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let stem = product
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let dir = product.parent().unwrap_or(Path::new("."));
    // What to draw, found in order (a product added to the file later is
    // read back from it here, one read at a time), then drawn on every core.
    let mut jobs: Vec<(PathBuf, Cow<'_, Product>, usize, String, String)> = Vec::new();
    for w in wanted {
        let f = match p.fields.iter().find(|f| f.spec.name == w.variable) {
            Some(f) => Cow::Borrowed(f),
            None => match added_later(product, &w.variable) {
                Some(f) => Cow::Owned(f),
                None => {
                    debug!(variable = %w.variable, "quicklook: not in this step");
                    continue;
                }
            },
        };
        let Some((k, level_text)) = level_index(p, &f, w.level) else {
            debug!(variable = %w.variable, level = ?w.level, "quicklook: no such level in this step");
            continue;
        };
        let suffix = level_text
            .split_whitespace()
            .next()
            .map(|l| format!("_{}", l.replace('.', "p")))
            .unwrap_or_default();
        let path = dir.join(format!("{stem}_{}{suffix}.png", f.spec.name));
        jobs.push((path, f, k, level_text, level_key(w.level)));
    }
    if jobs.is_empty() {
        return out;
    }
    // The graticule and the outline are the same on every image of the
    // step: worked out once.
    let outline = outline_of(p, look);
    let backdrop = match Backdrop::new(p.lat.view(), p.lon.view(), &outline) {
        Ok(b) => b,
        Err(e) => {
            warn!(file = %product.display(), error = %e, "quicklooks not drawn");
            return out;
        }
    };
    let written: Vec<Option<PathBuf>> = jobs
        .par_iter()
        .map(|(path, f, k, level_text, level)| {
            match draw_one(p, f, *k, level_text, level, look, &backdrop)
                .map_err(std::io::Error::other)
                .and_then(|png| super::write_file_atomic(path, &png))
            {
                Ok(()) => Some(path.clone()),
                Err(e) => {
                    warn!(file = %path.display(), error = %e, "quicklook not written");
                    None
                }
            }
        })
        .collect();
    out.extend(written.into_iter().flatten());
    out
}

/// What outlines the land on the step's images, as the settings ask.
fn outline_of<'a>(p: &'a StepProducts, look: &'a Look<'_>) -> Outline<'a> {
    let terrain = look.terrain.as_ref().filter(|t| t.dim() == p.lat.dim());
    match (look.settings.outline, terrain) {
        (OutlineKind::Coastlines, _) => Outline::Coastlines(&p.grid),
        (OutlineKind::Terrain, Some(t)) => Outline::Terrain {
            height: t.view(),
            levels: &look.settings.terrain_m,
        },
        _ => Outline::None,
    }
}

/// One image of level `k` of product `f`, as PNG bytes, on the backdrop of
/// the step's grid and outline.
fn draw_one(
    p: &StepProducts,
    f: &Product,
    k: usize,
    level_text: &str,
    level: &str,
    look: &Look<'_>,
    backdrop: &Backdrop,
) -> Result<Vec<u8>, String> {
    let name = f.spec.name;
    let shown = scales::shown_units(f.spec.units);
    let factor = shown.factor as f32;
    let mut values = f.level(k).mapv(|x| x * factor);
    let mut south = false;
    if scales::by_magnitude(name) {
        (values, south) = by_magnitude(&values, &p.lat);
    }
    let (scale, from_values) = scale_of(look, name, level, &values.view());
    let settings = look.settings;
    // The 2 PVU line: of the field itself on PV maps, of PV on the chosen
    // isentrope on tropopause maps.
    let pv_on_isentrope = if scales::is_tropopause(name) {
        isentropic_pv_pvu(p, settings.contour_theta_k)
    } else {
        None
    };
    let line_field = if matches!(name, "pv" | "isen_pv") {
        Some(values.view())
    } else {
        pv_on_isentrope.as_ref().map(|v| v.view())
    };
    let pvu = settings.contour_pvu;
    let line_label = if scales::is_tropopause(name) {
        format!("{pvu} PVU on {} K", settings.contour_theta_k)
    } else {
        format!("{pvu} PVU")
    };
    let contour = line_field.map(|v| Contour {
        values: v,
        level: pvu,
        label: &line_label,
    });
    // The variable and level first: a long name may be cut at the image's edge.
    // A PV surface is one per magnitude: +v in the north, -v in the south.
    let shown_level = if f.vertical == Vertical::PvSurface {
        format!("\u{b1}{level_text}")
    } else {
        level_text.to_string()
    };
    let mut head = if level_text.is_empty() {
        f.spec.name.to_string()
    } else {
        format!("{} {shown_level}", f.spec.name)
    };
    if south {
        head.push_str(", sign reversed south of the equator");
    }
    let title = format!("{head}: {}", f.spec.long_name);
    let lead = (p.valid_time - p.reference_time).num_hours();
    let subtitle = format!(
        "valid {} UTC   cycle {} UTC +{lead} h",
        p.valid_time.format("%a %Y-%m-%d %H:%M"),
        p.reference_time.format("%Y-%m-%d %H:%M")
    );
    let units = if from_values {
        format!("{} (range of this field)", shown.units)
    } else {
        shown.units.clone()
    };
    let q = Quicklook {
        values: values.view(),
        lat: p.lat.view(),
        lon: p.lon.view(),
        title: &title,
        subtitle: &subtitle,
        units: &units,
        scale,
        outline: outline_of(p, look),
        contour,
    };
    render_on(&q, backdrop)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn image_specs_parse_levels_layers_and_negative_values() {
        assert_eq!(parse("trop_p").unwrap().level, None);
        assert_eq!(parse("isen_pv@320").unwrap().level, Some((320.0, None)));
        assert_eq!(
            parse("thick@1000-500").unwrap().level,
            Some((1000.0, Some(500.0)))
        );
        assert_eq!(parse("trop_p@-2").unwrap().level, Some((-2.0, None)));
        assert!(parse("bad name@3").is_err());
        assert!(parse("eta@five").is_err());
    }

    /// A product with a fixed scale keeps it whatever its values hold, so that
    /// steps and runs compare; a configured scale replaces it, also whatever
    /// the values; only a product without either spans its own values. The
    /// fixed ranges are those of the table in docs/configuration.md
    /// ("Colour scales").
    #[test]
    fn a_fixed_or_configured_scale_ignores_the_values_and_only_others_span_them() {
        let calm = ndarray::Array2::from_elem((4, 5), 300.0f32);
        let mut wild = ndarray::Array2::from_elem((4, 5), 20.0f32);
        wild[(1, 2)] = 9000.0;
        wild[(3, 4)] = f32::NAN;
        let mut settings = Quicklooks::default();
        let look = |s: &Quicklooks| -> (Scale, bool, Scale, bool, Scale) {
            let l = Look {
                settings: s,
                terrain: None,
            };
            let (a, fa) = scale_of(&l, "trop_p", "2", &calm.view());
            let (b, fb) = scale_of(&l, "trop_p", "2", &wild.view());
            let (c, _) = scale_of(&l, "trop_theta", "2", &wild.view());
            (a, fa, b, fb, c)
        };
        let (a, fa, b, fb, c) = look(&settings);
        assert!(!fa && !fb);
        assert_eq!(a, b);
        assert_eq!((a.min, a.max, a.step), (100.0, 500.0, 25.0));
        assert_eq!((c.min, c.max, c.step), (280.0, 380.0, 5.0));
        settings
            .scales
            .insert("trop_p@2".into(), vec![150.0, 450.0, 50.0]);
        let (a, fa, b, fb, _) = look(&settings);
        assert!(!fa && !fb);
        assert_eq!(a, b);
        assert_eq!(
            (a.min, a.max, a.step, a.reversed),
            (150.0, 450.0, 50.0, true)
        );
        // A variable with no fixed scale spans its values, and says so.
        let l = Look {
            settings: &settings,
            terrain: None,
        };
        let (s1, f1) = scale_of(&l, "no_such_field", "", &calm.view());
        let (s2, f2) = scale_of(&l, "no_such_field", "", &wild.view());
        assert!(f1 && f2);
        assert!(s2.min <= 20.0 && s2.max >= 9000.0, "{s2:?}");
        assert_ne!(s1, s2);
    }
}
