use super::*;
use crate::geometry::{Earth, Horizontal};
use ndarray::Array2;

/// A decoded image.
struct Image {
    w: usize,
    h: usize,
    rgb: Vec<u8>,
}

impl Image {
    fn px(&self, x: usize, y: usize) -> [u8; 3] {
        let k = 3 * (y * self.w + x);
        [self.rgb[k], self.rgb[k + 1], self.rgb[k + 2]]
    }
}

/// Decode with the `png` crate's own decoder: 8-bit RGB is required.
fn decode(bytes: &[u8]) -> Image {
    let mut reader = png::Decoder::new(std::io::Cursor::new(bytes))
        .read_info()
        .expect("PNG header");
    let mut buf = vec![0; reader.output_buffer_size().expect("buffer size")];
    let info = reader.next_frame(&mut buf).expect("PNG frame");
    assert_eq!(info.color_type, png::ColorType::Rgb);
    assert_eq!(info.bit_depth, png::BitDepth::Eight);
    buf.truncate(info.buffer_size());
    Image {
        w: info.width as usize,
        h: info.height as usize,
        rgb: buf,
    }
}

/// Regular lat/lon grid: row r at lat0 + r dlat, column c at lon0 + c dlon.
fn latlon(
    ny: usize,
    nx: usize,
    lat0: f64,
    dlat: f64,
    lon0: f64,
    dlon: f64,
) -> (Array2<f64>, Array2<f64>) {
    (
        Array2::from_shape_fn((ny, nx), |(r, _)| lat0 + r as f64 * dlat),
        Array2::from_shape_fn((ny, nx), |(_, c)| lon0 + c as f64 * dlon),
    )
}

fn seq(min: f64, max: f64, step: f64) -> Scale {
    Scale::fixed(Palette::Sequential, min, max, step)
}

fn plain<'a>(
    v: &'a Array2<f32>,
    lat: &'a Array2<f64>,
    lon: &'a Array2<f64>,
    scale: Scale,
) -> Quicklook<'a> {
    Quicklook {
        values: v.view(),
        lat: lat.view(),
        lon: lon.view(),
        title: "Test field",
        subtitle: "valid 2026-03-14 06:00 UTC",
        units: "K",
        scale,
        outline: Outline::None,
        contour: None,
    }
}

fn draw(v: &Array2<f32>, lat: &Array2<f64>, lon: &Array2<f64>, scale: Scale) -> Image {
    decode(&render(&plain(v, lat, lon, scale)).expect("render"))
}

#[test]
fn size_follows_the_grid_and_the_map_is_600_to_900_wide() {
    // 41 x 21 points: 15 pixels a point is the first whole number to
    // reach 600 px (41 x 15 = 615), within 900.
    let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
    let v = Array2::from_elem((21, 41), 3.0_f32);
    let img = draw(&v, &lat, &lon, seq(0.0, 10.0, 1.0));
    let lay = layout(41, 21);
    assert_eq!((lay.map_w, lay.map_h), (615, 315));
    assert_eq!((img.w, img.h), (lay.width, lay.height));
    assert_eq!(img.w, 640 + 2 * 16);
    assert_eq!(map_size(1440, 721), (900, 451));
    assert_eq!(map_size(100, 3000), (30, 900));
    assert_eq!(map_size(1, 1), (600, 600));
    assert_eq!(map_size(500, 400), (500, 400));
}

#[test]
fn a_fixed_scale_gives_a_value_the_same_colour_whatever_else_the_field_holds() {
    // Two fields share the value 4.3 in their west half; their east halves
    // differ wildly. The west halves must be drawn identically: steps and runs
    // compare. 4.3 lies in band 4 of 0..10 by 1.
    let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
    let scale = seq(0.0, 10.0, 1.0);
    let a = Array2::from_shape_fn((21, 41), |(_, c)| if c < 20 { 4.3 } else { 0.5 });
    let b = Array2::from_shape_fn((21, 41), |(_, c)| if c < 20 { 4.3 } else { 97.0 });
    let (ia, ib) = (draw(&a, &lat, &lon, scale), draw(&b, &lat, &lon, scale));
    let lay = layout(41, 21);
    let p = (lay.map_x + 30, lay.map_y + 40);
    assert_eq!(ia.px(p.0, p.1), ib.px(p.0, p.1));
    assert_eq!(ia.px(p.0, p.1), scale.band_colour(4));
    // 97 is beyond the top: the top band's colour.
    let e = (lay.map_x + lay.map_w - 30, lay.map_y + 40);
    assert_eq!(ib.px(e.0, e.1), scale.band_colour(9));
}

#[test]
fn each_value_takes_its_band_and_the_bands_run_along_the_ramp() {
    let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
    let lay = layout(41, 21);
    let k = lay.map_w / 41;
    // v = column / 4: columns 0..40 span 0..10 over bands of 1.
    let v = Array2::from_shape_fn((21, 41), |(_, c)| c as f32 / 4.0);
    let scale = seq(0.0, 10.0, 1.0);
    let img = draw(&v, &lat, &lon, scale);
    let y = lay.map_y + lay.map_h / 2 + 3;
    for c in 0..41 {
        let want = scale.band_colour(scale.band_of(c as f64 / 4.0));
        assert_eq!(img.px(lay.map_x + c * k + k / 2, y), want, "column {c}");
    }
    // Band colours grow lighter up the sequential ramp, and darker when reversed.
    let l: Vec<f64> = (0..10)
        .map(|b| ramps::lightness(scale.band_colour(b)))
        .collect();
    assert!(l.windows(2).all(|w| w[1] > w[0] + 0.03), "{l:?}");
    let rev = Scale {
        reversed: true,
        ..scale
    };
    let l: Vec<f64> = (0..10)
        .map(|b| ramps::lightness(rev.band_colour(b)))
        .collect();
    assert!(l.windows(2).all(|w| w[1] < w[0] - 0.03), "{l:?}");
}

#[test]
fn the_colour_bar_shows_every_band_with_arrows_at_its_ends() {
    let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
    let v = Array2::from_elem((21, 41), 3.0_f32);
    let scale = Scale::fixed(Palette::Diverging, -50.0, 50.0, 10.0);
    let img = draw(&v, &lat, &lon, scale);
    let lay = layout(41, 21);
    let y = lay.bar_y + BAR_H / 2;
    let per = lay.bar_w as f64 / 10.0;
    for b in 0..10 {
        let x = lay.bar_x + (per * (b as f64 + 0.5)) as usize;
        assert_eq!(img.px(x, y), scale.band_colour(b), "band {b}");
    }
    // Low end petrol blue, high end copper.
    let (lo, hi) = (scale.band_colour(0), scale.band_colour(9));
    assert!(lo[2] > lo[0] + 40, "{lo:?}");
    assert!(hi[0] > hi[2] + 40, "{hi:?}");
    // The arrows: the end colours just outside the bar, on its middle row.
    assert_eq!(img.px(lay.bar_x - 4, y), lo);
    assert_eq!(img.px(lay.bar_x + lay.bar_w + 3, y), hi);
}

#[test]
fn type_is_anti_aliased_and_as_wide_as_the_typeface_says() {
    let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
    let v = Array2::from_elem((21, 41), 3.0_f32);
    let img = draw(&v, &lat, &lon, seq(0.0, 10.0, 1.0));
    let lay = layout(41, 21);
    let rows = lay.title_y..lay.subtitle_y;
    let inked: Vec<(usize, [u8; 3])> = rows
        .flat_map(|y| (0..img.w).map(move |x| (x, y)))
        .map(|(x, y)| (x, img.px(x, y)))
        .filter(|(_, p)| *p != BACKGROUND)
        .collect();
    // Grey levels between ink and paper: the glyphs' edges are smoothed.
    let greys: std::collections::BTreeSet<[u8; 3]> = inked.iter().map(|p| p.1).collect();
    assert!(greys.len() > 10, "{} grey levels", greys.len());
    let left = inked.iter().map(|p| p.0).min().unwrap();
    let right = inked.iter().map(|p| p.0).max().unwrap();
    let want = text::width("Test field", TITLE_SIZE, Weight::Bold);
    assert!((MARGIN - 1..=MARGIN + 2).contains(&left), "{left}");
    assert!(
        ((right + 1 - left) as f32 - want).abs() < 4.0,
        "{left}..{right} vs {want}"
    );
}

#[test]
fn graticule_crosses_at_10_20_30_east_and_50_north() {
    // 41 columns 0..40 E, 21 rows 55..45 N; 15 px a point, so the centre
    // of column c is pixel 15 c + 7 and of row r pixel 15 r + 7.
    let (lat, lon) = latlon(21, 41, 55.0, -0.5, 0.0, 1.0);
    let v = Array2::from_elem((21, 41), 1.0_f32);
    let img = draw(&v, &lat, &lon, seq(0.0, 10.0, 1.0));
    let lay = layout(41, 21);
    let field = img.px(lay.map_x + 3, lay.map_y + 3);
    let marked = |y: usize| -> Vec<usize> {
        (0..lay.map_w)
            .filter(|&x| img.px(lay.map_x + x, lay.map_y + y) != field)
            .collect()
    };
    let centre = |i: usize| 15 * i + 7;
    for y in [0, 30, 100, 200, lay.map_h - 1] {
        assert_eq!(
            marked(y),
            vec![centre(10), centre(20), centre(30), centre(40)]
        );
    }
    assert_eq!(marked(centre(10)).len(), lay.map_w);
    assert_eq!(marked(centre(10) - 1).len(), 4);
}

#[test]
fn graticule_has_no_line_along_the_longitude_seam() {
    let lay = layout(21, 9);
    let k = lay.map_w / 21;
    let expect = |g: f64| (g + 0.5) * k as f64 - 0.5;
    let to_0_360 = |l: f64| l.rem_euclid(360.0);
    let conventions: [(f64, &dyn Fn(f64) -> f64); 2] = [(175.3, &wrap180), (355.3, &to_0_360)];
    for (west, convention) in conventions {
        let lat = Array2::from_shape_fn((9, 21), |(r, _)| 48.0 - r as f64);
        let lon = Array2::from_shape_fn((9, 21), |(_, c)| convention(west + c as f64));
        let v = Array2::from_elem((9, 21), 2.0_f32);
        let img = draw(&v, &lat, &lon, seq(0.0, 10.0, 1.0));
        let field = img.px(lay.map_x + 1, lay.map_y + 1);
        for y in [1, lay.map_h / 2, lay.map_h - 2] {
            let marked: Vec<usize> = (0..lay.map_w)
                .filter(|&x| img.px(lay.map_x + x, lay.map_y + y) != field)
                .collect();
            assert_eq!(marked.len(), 2, "from {west} E, row {y}: {marked:?}");
            assert!((marked[0] as f64 - expect(4.7)).abs() <= 1.0, "{marked:?}");
            assert!((marked[1] as f64 - expect(14.7)).abs() <= 1.0, "{marked:?}");
        }
    }
}

#[test]
fn north_is_up_whichever_way_the_rows_run() {
    for (lat0, dlat) in [(41.0, 0.4), (49.0, -0.4)] {
        let (lat, lon) = latlon(21, 41, lat0, dlat, 1.0, 0.2);
        let v = lat.mapv(|l| l as f32);
        let scale = seq(41.0, 49.0, 1.0);
        let img = draw(&v, &lat, &lon, scale);
        let lay = layout(41, 21);
        let x = lay.map_x + lay.map_w / 2;
        assert_eq!(img.px(x, lay.map_y), scale.band_colour(7), "dlat {dlat}");
        assert_eq!(
            img.px(x, lay.map_y + lay.map_h - 1),
            scale.band_colour(0),
            "dlat {dlat}"
        );
    }
}

#[test]
fn missing_values_are_neutral_grey() {
    let (lat, lon) = latlon(21, 41, 49.0, -0.4, 1.0, 0.2);
    let mut v = Array2::from_shape_fn((21, 41), |(r, c)| ((r + c) % 10) as f32);
    v[[10, 20]] = f32::NAN;
    v[[20, 40]] = f32::INFINITY;
    let img = draw(&v, &lat, &lon, seq(0.0, 10.0, 1.0));
    let lay = layout(41, 21);
    let k = lay.map_w / 41;
    for (r, c) in [(10, 20), (20, 40)] {
        for d in 1..k - 1 {
            assert_eq!(
                img.px(lay.map_x + c * k + d, lay.map_y + r * k + d),
                MISSING,
                "({r}, {c})"
            );
        }
    }
}

#[test]
fn the_contour_line_lies_where_the_field_crosses_its_level() {
    // v = latitude, 41..49 N over 21 rows; the 45.2 contour is the row
    // where latitude is 45.2, i.e. row (45.2 - 41) / 0.4 = 10.5 from the south.
    let (lat, lon) = latlon(21, 41, 41.0, 0.4, 1.0, 0.2);
    let v = lat.mapv(|l| l as f32);
    let mut q = plain(&v, &lat, &lon, seq(41.0, 49.0, 1.0));
    q.contour = Some(Contour {
        values: v.view(),
        level: 45.2,
        label: "45.2 N",
    });
    let img = decode(&render(&q).unwrap());
    let lay = layout(41, 21);
    let place = Placement {
        nx: 41,
        ny: 21,
        w: lay.map_w,
        h: lay.map_h,
        flip: true,
    };
    let (_, y) = place.pixel(20.0, 10.5);
    let x = lay.map_x + lay.map_w / 2;
    let yc = lay.map_y + y.round() as usize;
    let on = (yc - 1..=yc + 1)
        .map(|y| img.px(x, y))
        .min_by_key(|p| p[0])
        .unwrap();
    assert!(on.iter().all(|&c| c < 40), "line {on:?}");
    // 6 px away: the field again.
    let off = img.px(x, lay.map_y + y.round() as usize + 6);
    assert!(off != on && off.iter().any(|&c| c > 60), "{off:?}");
}

fn global_grid(dl: f64) -> (Grid, Array2<f64>, Array2<f64>) {
    let nlat = (180.0 / dl) as usize + 1;
    let nlon = (360.0 / dl) as usize;
    let g = Grid {
        earth: Earth::sphere(6_371_229.0),
        horizontal: Horizontal::LatLon {
            lat: (0..nlat).map(|k| -90.0 + k as f64 * dl).collect(),
            lon: (0..nlon).map(|k| k as f64 * dl).collect(),
            gaussian: None,
        },
        template: 0,
    };
    let (lat, lon) = g.latlon();
    (g, lat, lon)
}

#[test]
fn coastlines_fall_on_the_coast_and_not_on_open_sea() {
    // A 1-degree global grid, stored south to north from 0 E.
    let (g, lat, lon) = global_grid(1.0);
    let v = Array2::from_elem(lat.dim(), 0.5_f32);
    let mut q = plain(&v, &lat, &lon, seq(0.0, 10.0, 1.0));
    q.outline = Outline::Coastlines(&g);
    let img = decode(&render(&q).unwrap());
    let lay = layout(lat.ncols(), lat.nrows());
    let place = Placement {
        nx: lat.ncols(),
        ny: lat.nrows(),
        w: lay.map_w,
        h: lay.map_h,
        flip: true,
    };
    let field = seq(0.0, 10.0, 1.0).band_colour(0);
    let inked_near = |la: f64, lo: f64, r: usize| {
        let (c, row) = outline::locate(&g, la, lo).unwrap();
        let (x, y) = place.pixel(c, row);
        let (x, y) = (x.round() as usize, y.round() as usize);
        (x.saturating_sub(r)..=x + r).any(|px| {
            (y.saturating_sub(r)..=y + r).any(|py| {
                px < lay.map_w && py < lay.map_h && img.px(lay.map_x + px, lay.map_y + py) != field
            })
        })
    };
    // Coast points (from memory): Cape Agulhas, Cape Horn, Cape Chelyuskin,
    // the Kamchatka tip, west Ireland.
    for (la, lo) in [
        (-34.8, 20.0),
        (-56.0, -67.3),
        (77.7, 104.3),
        (51.2, 156.7),
        (53.5, -10.0),
    ] {
        assert!(inked_near(la, lo, 2), "no line at {la} N {lo} E");
    }
    // Mid-ocean points far from land (and from 10-degree graticule lines).
    for (la, lo) in [(-35.0, -125.0), (25.0, -45.0), (-15.0, 85.0)] {
        assert!(!inked_near(la, lo, 2), "line at {la} N {lo} E");
    }
}

#[test]
fn terrain_contours_outline_an_invented_island() {
    // A cone 1000 m high at the centre of a 41 x 41 grid, 100 m per grid
    // step from its top: the 500 m contour is a circle of radius 5 steps.
    let (lat, lon) = latlon(41, 41, 40.0, 0.25, 0.0, 0.25);
    let height = Array2::from_shape_fn((41, 41), |(r, c)| {
        (1000.0 - 100.0 * (r as f64 - 20.0).hypot(c as f64 - 20.0)).max(0.0) as f32
    });
    // A light field: the outline is drawn in dark ink over it.
    let v = Array2::from_elem((41, 41), 9.5_f32);
    let mut q = plain(&v, &lat, &lon, seq(0.0, 10.0, 1.0));
    let levels = [500.0];
    q.outline = Outline::Terrain {
        height: height.view(),
        levels: &levels,
    };
    let img = decode(&render(&q).unwrap());
    let lay = layout(41, 41);
    let k = (lay.map_w / 41) as f64;
    let field = seq(0.0, 10.0, 1.0).band_colour(9);
    let centre = (
        lay.map_x as f64 + 20.5 * k - 0.5,
        lay.map_y as f64 + 20.5 * k - 0.5,
    );
    let mut on_ring = 0;
    let mut elsewhere = 0;
    for y in lay.map_y..lay.map_y + lay.map_h {
        for x in lay.map_x..lay.map_x + lay.map_w {
            let p = img.px(x, y);
            let d = (x as f64 - centre.0).hypot(y as f64 - centre.1) / k;
            if p != field && p.iter().all(|&c| c < 150) {
                if (d - 5.0).abs() < 0.3 {
                    on_ring += 1;
                } else if (d - 5.0).abs() > 0.6 {
                    elsewhere += 1;
                }
            }
        }
    }
    assert!(on_ring > 200, "{on_ring}");
    assert_eq!(elsewhere, 0);
}

#[test]
fn bad_shapes_and_scales_are_refused_naming_them() {
    let v = Array2::from_elem((3, 4), 1.0_f32);
    let (lat, lon) = latlon(3, 5, 0.0, 1.0, 0.0, 1.0);
    let e = render(&plain(&v, &lat, &lon, seq(0.0, 1.0, 0.1))).expect_err("shapes differ");
    assert!(e.contains("(3, 4)") && e.contains("(3, 5)"), "{e}");
    let (lat, lon) = latlon(3, 4, 0.0, 1.0, 0.0, 1.0);
    for s in [
        seq(f64::NAN, 1.0, 0.1),
        seq(0.0, f64::INFINITY, 0.1),
        seq(2.0, 2.0, 0.1),
        seq(3.0, 1.0, 0.1),
        seq(-1e308, 1e308, 1e307),
        seq(0.0, 1.0, 0.0),
        seq(0.0, 1.0, 0.001),
    ] {
        assert!(render(&plain(&v, &lat, &lon, s)).is_err(), "{s:?}");
    }
    let empty = Array2::<f32>::zeros((0, 4));
    let (lat, lon) = latlon(0, 4, 0.0, 1.0, 0.0, 1.0);
    assert!(render(&plain(&empty, &lat, &lon, seq(0.0, 1.0, 0.1))).is_err());
}

#[test]
fn awkward_text_does_not_panic() {
    let (lat, lon) = latlon(5, 5, 0.0, 1.0, 0.0, 1.0);
    let v = Array2::from_elem((5, 5), 1.0_f32);
    let long = "x".repeat(500) + "\u{1F600}\n°C m s⁻¹";
    let mut q = plain(&v, &lat, &lon, seq(0.0, 2.0, 0.25));
    q.title = &long;
    q.subtitle = &long;
    q.units = &long;
    decode(&render(&q).expect("long text"));
}

#[test]
fn band_steps_and_labels_closed_forms() {
    assert_eq!(band_step(10.0), 1.0);
    assert_eq!(band_step(400.0), 20.0);
    assert_eq!(band_step(100.0), 10.0);
    assert_eq!(band_step(0.7), 0.05);
    assert_eq!(edge_label(-75.0, 25.0), "\u{2212}75");
    assert_eq!(edge_label(0.25, 0.25), "0.25");
    assert_eq!(edge_label(1e-17, 0.1), "0.0");
    assert_eq!(edge_label(2e9, 1e9), "2.00e9");
    // A field spanning -3.2 .. 7.9: bands of 1 from -4 to 8.
    let v = Array2::from_shape_vec((1, 3), vec![-3.2_f32, 7.9, f32::NAN]).unwrap();
    let s = Scale::spanning(&v.view(), Palette::Sequential);
    assert_eq!((s.min, s.max, s.step), (-4.0, 8.0, 1.0));
    let d = Scale::spanning(&v.view(), Palette::Diverging);
    assert_eq!((d.min, d.max, d.step), (-8.0, 8.0, 1.0));
    // Labelled edges are round numbers and never crowd: 0..500 by 25 is
    // labelled every 4 edges (0, 100, ...) on a 560 px bar, or closer.
    let scale = seq(0.0, 500.0, 25.0);
    let xs: Vec<f64> = (0..=20).map(|i| i as f64 * 28.0).collect();
    let labels: Vec<String> = (0..=20)
        .map(|i| edge_label(i as f64 * 25.0, 25.0))
        .collect();
    let chosen = labelled_edges(&scale, &xs, &labels);
    assert!(chosen.len() >= 5, "{chosen:?}");
    let k = chosen[1] - chosen[0];
    assert!(chosen.iter().all(|&i| (i * 25) % (k * 25) == 0));
}
