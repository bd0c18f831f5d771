//! Which quicklook images a step gets and where they go.
//!
//! In: a step's products as written (fields on the model grid, coordinates)
//! and the configured list of images, each `variable` or `variable@level`
//! (the level in the variable's own vertical coordinate: hPa on isobaric
//! levels, K on isentropic surfaces, PVU on PV surfaces, `bottom-top` for
//! layers). Out: PNG files beside the NetCDF file, `<stem>_<variable>[_<level>].png`,
//! each written under a hidden name, fsynced and renamed into place. A
//! variable the step does not have is passed over; an image never stops a
//! step. The images are guidance for trained forecasters, not warnings.

use std::path::{Path, PathBuf};

use tracing::{debug, warn};

use super::cf::{Product, StepProducts, Vertical};
use super::quicklook::{render, Palette, Quicklook, Scale};

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
    let (spec, vertical) = crate::changes::budget_vars::find(name)?;
    let (_, data) = super::store::read_field(product, name)?;
    Some(Product::new(spec, vertical, data))
}

/// Colour scale of a variable: changes and signed quantities diverge about zero.
fn scale_for(name: &str) -> Scale {
    let diverging = [
        "zeta", "chg", "r2r", "diff", "stretch", "dpvdt", "isen_u", "isen_v", "trop_u", "trop_v",
    ]
    .iter()
    .any(|k| name.contains(k));
    let mut s = Scale::from_data(if diverging {
        Palette::Diverging
    } else {
        Palette::Sequential
    });
    // Low tropopause pressure is a high tropopause: draw high as light.
    s.reversed = name == "trop_p";
    s
}

/// Write the asked images of a step beside `product`. Returns the images written.
pub fn write_images(product: &Path, p: &StepProducts, wanted: &[Wanted]) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let stem = product
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let dir = product.parent().unwrap_or(Path::new("."));
    let lead = (p.valid_time - p.reference_time).num_hours();
    for w in wanted {
        // The step's own products, or one added to the file after it was
        // written (the PV budget), read back from the file.
        let from_file;
        let f = match p.fields.iter().find(|f| f.spec.name == w.variable) {
            Some(f) => f,
            None => match added_later(product, &w.variable) {
                Some(f) => {
                    from_file = f;
                    &from_file
                }
                None => {
                    debug!(variable = %w.variable, "quicklook: not in this step");
                    continue;
                }
            },
        };
        let Some((k, level_text)) = level_index(p, f, w.level) else {
            debug!(variable = %w.variable, level = ?w.level, "quicklook: no such level in this step");
            continue;
        };
        // Forecasters read pressure in hPa and PV in PVU.
        let (values, units) = match f.spec.units {
            "Pa" => (f.level(k).mapv(|x| x / 100.0), "hPa"),
            // 1 PVU = 1e-6 K m2 kg-1 s-1; 1 PVU per hour = 1e-6/3600 K m2 kg-1 s-2.
            "K m2 kg-1 s-1" => (f.level(k).mapv(|x| (f64::from(x) * 1e6) as f32), "PVU"),
            "K m2 kg-1 s-2" => (
                f.level(k).mapv(|x| (f64::from(x) * 3.6e9) as f32),
                "PVU h-1",
            ),
            u => (f.level(k), u),
        };
        // The variable and level first: a long name may be cut at the image's edge.
        // A PV surface is one per magnitude: +v in the north, -v in the south.
        let shown = if f.vertical == Vertical::PvSurface {
            format!("+/-{level_text}")
        } else {
            level_text.clone()
        };
        let title = if level_text.is_empty() {
            format!("{}: {}", f.spec.name, f.spec.long_name)
        } else {
            format!("{} {shown}: {}", f.spec.name, f.spec.long_name)
        };
        let subtitle = format!(
            "valid {} UTC  (cycle {} UTC +{lead} h)",
            p.valid_time.format("%Y-%m-%d %H:%M"),
            p.reference_time.format("%Y-%m-%d %H:%M")
        );
        let q = Quicklook {
            values: values.view(),
            lat: p.lat.view(),
            lon: p.lon.view(),
            title: &title,
            subtitle: &subtitle,
            units,
            scale: scale_for(f.spec.name),
        };
        let suffix = level_text
            .split_whitespace()
            .next()
            .map(|l| format!("_{}", l.replace('.', "p")))
            .unwrap_or_default();
        let path = dir.join(format!("{stem}_{}{suffix}.png", f.spec.name));
        match render(&q)
            .map_err(std::io::Error::other)
            .and_then(|png| super::write_file_atomic(&path, &png))
        {
            Ok(()) => out.push(path),
            Err(e) => warn!(file = %path.display(), error = %e, "quicklook not written"),
        }
    }
    out
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
}
