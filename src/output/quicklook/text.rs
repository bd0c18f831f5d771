//! Type for the quicklooks: DejaVu Sans (the `dejavu` crate embeds the font
//! files of DejaVu 2.37, Bitstream Vera licence with public-domain changes),
//! rasterised with anti-aliasing by `ab_glyph`, kerned, on whole-pixel
//! baselines.

use std::sync::OnceLock;

use ab_glyph::{Font, FontRef, PxScale, ScaleFont};

use super::Canvas;

/// Weight of the type.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Weight {
    /// DejaVu Sans.
    Regular,
    /// DejaVu Sans Bold.
    Bold,
}

fn font(weight: Weight) -> Option<&'static FontRef<'static>> {
    static REGULAR: OnceLock<Option<FontRef<'static>>> = OnceLock::new();
    static BOLD: OnceLock<Option<FontRef<'static>>> = OnceLock::new();
    let (cell, bytes) = match weight {
        Weight::Regular => (&REGULAR, dejavu::sans::regular()),
        Weight::Bold => (&BOLD, dejavu::sans::bold()),
    };
    cell.get_or_init(|| FontRef::try_from_slice(bytes).ok())
        .as_ref()
}

/// Control characters become spaces; everything else is drawn as the font
/// has it (DejaVu covers Latin, Greek, superscripts, the degree and minus
/// signs; a character it lacks shows as its empty-box glyph).
fn clean(s: &str) -> impl Iterator<Item = char> + '_ {
    s.chars().map(|c| if c.is_control() { ' ' } else { c })
}

/// Width of `s` in pixels at `size` pixels to the em.
pub fn width(s: &str, size: f32, weight: Weight) -> f32 {
    let Some(f) = font(weight) else {
        return 0.0;
    };
    let sf = f.as_scaled(PxScale::from(size));
    let mut w = 0.0;
    let mut prev = None;
    for c in clean(s) {
        let id = sf.glyph_id(c);
        if let Some(p) = prev {
            w += sf.kern(p, id);
        }
        w += sf.h_advance(id);
        prev = Some(id);
    }
    w
}

/// Height above the baseline of capitals and tall letters, pixels.
pub fn ascent(size: f32, weight: Weight) -> f32 {
    font(weight).map_or(size * 0.76, |f| f.as_scaled(PxScale::from(size)).ascent())
}

/// `s` cut to fit `room` pixels, ending in an ellipsis when cut.
pub fn fit(s: &str, room: f32, size: f32, weight: Weight) -> String {
    let clean: String = clean(s).collect();
    if width(&clean, size, weight) <= room {
        return clean;
    }
    let mut kept: Vec<char> = clean.chars().collect();
    while !kept.is_empty() {
        kept.pop();
        let candidate: String = kept.iter().collect::<String>() + "\u{2026}";
        if width(&candidate, size, weight) <= room {
            return candidate;
        }
    }
    String::new()
}

/// Draw `s` with its baseline at `baseline` and its left edge at `x`.
pub fn draw(
    img: &mut Canvas,
    x: f32,
    baseline: f32,
    s: &str,
    size: f32,
    weight: Weight,
    ink: [u8; 3],
) {
    let Some(f) = font(weight) else {
        return;
    };
    let sf = f.as_scaled(PxScale::from(size));
    let mut pen = x.round();
    let base = baseline.round();
    let mut prev = None;
    for c in clean(s) {
        let id = sf.glyph_id(c);
        if let Some(p) = prev {
            pen += sf.kern(p, id);
        }
        let glyph = id.with_scale_and_position(sf.scale(), ab_glyph::point(pen, base));
        if let Some(outline) = f.outline_glyph(glyph) {
            let b = outline.px_bounds();
            outline.draw(|gx, gy, cov| {
                let px = b.min.x as i64 + i64::from(gx);
                let py = b.min.y as i64 + i64::from(gy);
                if px >= 0 && py >= 0 {
                    img.blend(px as usize, py as usize, ink, cov);
                }
            });
        }
        pen += sf.h_advance(id);
        prev = Some(id);
    }
}
