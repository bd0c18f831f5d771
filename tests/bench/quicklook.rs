//! Benchmark of the quicklook images at a grid's full size: five images of a
//! global 0.25-degree grid (1440 x 721 points), as the default `[quicklook]`
//! list draws them (three with the Natural Earth outline and the 2 PVU line),
//! best of three each, on one backdrop (graticule and outline) worked out once
//! as a step does. Prints one JSON line for the backdrop, one per image
//! (seconds, PNG bytes) and their total; `--bench step` gives the images'
//! share of a whole step. With `--png DIR` the images are also written there.
//!
//!     cargo bench --bench quicklook [-- DEGREES] [--png DIR]
//!
//! The fields are smooth analytic waves with a little grid-scale noise, of
//! the size and texture of model fields (not measured weather).

use std::time::Instant;

use leeward::geometry::{Earth, Grid, Horizontal};
use leeward::output::quicklook::{
    render_on, Backdrop, Contour, Outline, Palette, Quicklook, Scale,
};
use ndarray::Array2;

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let deg: f64 = args.iter().find_map(|a| a.parse().ok()).unwrap_or(0.25);
    let png_dir = args
        .iter()
        .position(|a| a == "--png")
        .and_then(|k| args.get(k + 1))
        .map(std::path::PathBuf::from);
    let nlat = (180.0 / deg).round() as usize + 1;
    let nlon = (360.0 / deg).round() as usize;
    let grid = Grid {
        earth: Earth::sphere(6_371_229.0),
        horizontal: Horizontal::LatLon {
            lat: (0..nlat).map(|k| -90.0 + k as f64 * deg).collect(),
            lon: (0..nlon).map(|k| k as f64 * deg).collect(),
            gaussian: None,
        },
        template: 0,
    };
    let (lat, lon) = grid.latlon();
    // A deterministic noise of amplitude 1 (a hash of the indices).
    let noise = |r: usize, c: usize| {
        let h = (r as u64).wrapping_mul(0x9E37_79B9_7F4A_7C15)
            ^ (c as u64).wrapping_mul(0xC2B2_AE3D_27D4_EB4F);
        ((h >> 40) as f64 / (1u64 << 24) as f64) * 2.0 - 1.0
    };
    let wave = |amp: f64, base: f64, k: f64, noise_amp: f64| {
        Array2::from_shape_fn(lat.dim(), |(r, c)| {
            let (la, lo) = (lat[[r, c]].to_radians(), lon[[r, c]].to_radians());
            (base
                + amp * la.sin().abs() * (1.0 + 0.4 * (k * lo + 3.0 * la).sin())
                + noise_amp * noise(r, c)) as f32
        })
    };
    let fields = [
        (
            "trop_p",
            wave(-250.0, 420.0, 6.0, 8.0),
            Scale {
                reversed: true,
                ..Scale::fixed(Palette::Sequential, 100.0, 500.0, 25.0)
            },
            true,
        ),
        (
            "isen_pv",
            wave(7.0, 0.3, 5.0, 0.2),
            Scale {
                reversed: true,
                ..Scale::fixed(Palette::Sequential, 0.0, 10.0, 1.0)
            },
            true,
        ),
        (
            "eta",
            wave(14.0, 1.0, 8.0, 2.0),
            Scale {
                reversed: true,
                ..Scale::fixed(Palette::Sequential, 0.0, 32.0, 4.0)
            },
            false,
        ),
        (
            "thick",
            wave(-700.0, 5800.0, 4.0, 5.0),
            Scale::fixed(Palette::Sequential, 4800.0, 6000.0, 60.0),
            false,
        ),
        (
            "thick_chg_06h",
            wave(0.0, 0.0, 7.0, 40.0),
            Scale::fixed(Palette::Diverging, -120.0, 120.0, 20.0),
            false,
        ),
    ];
    let outline = Outline::Coastlines(&grid);
    let mut backdrop = None;
    let mut best = f64::INFINITY;
    for _ in 0..3 {
        let t = Instant::now();
        backdrop = Some(Backdrop::new(lat.view(), lon.view(), &outline).expect("backdrop"));
        best = best.min(t.elapsed().as_secs_f64());
    }
    let backdrop = backdrop.expect("three rounds");
    println!(
        "{{\"what\":\"quicklook_backdrop\",\"grid\":\"{nlon}x{nlat}\",\"seconds\":{best:.4}}}"
    );
    let mut total = best;
    let mut bytes = 0;
    for (name, v, scale, line) in &fields {
        let q = Quicklook {
            values: v.view(),
            lat: lat.view(),
            lon: lon.view(),
            title: name,
            subtitle: "valid 2026-03-15 00:00 UTC   cycle 2026-03-14 00:00 UTC +24 h",
            units: "units",
            scale: *scale,
            outline: Outline::Coastlines(&grid),
            contour: line.then(|| Contour {
                values: v.view(),
                level: 2.0,
                label: "2 PVU",
            }),
        };
        let mut best = f64::INFINITY;
        let mut size = 0;
        for _ in 0..3 {
            let t = Instant::now();
            let png = render_on(&q, &backdrop).expect("render");
            best = best.min(t.elapsed().as_secs_f64());
            size = png.len();
        }
        if let Some(dir) = &png_dir {
            let png = render_on(&q, &backdrop).expect("render");
            std::fs::create_dir_all(dir).expect("png dir");
            std::fs::write(dir.join(format!("{name}.png")), png).expect("write png");
        }
        total += best;
        bytes += size;
        println!("{{\"what\":\"quicklook\",\"name\":\"{name}\",\"grid\":\"{nlon}x{nlat}\",\"seconds\":{best:.4},\"png_bytes\":{size}}}");
    }
    println!(
        "{{\"what\":\"quicklooks\",\"images\":{},\"seconds_with_backdrop\":{total:.4},\"png_bytes\":{bytes}}}",
        fields.len()
    );
}
