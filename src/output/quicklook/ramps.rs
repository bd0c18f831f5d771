//! leeward's colour ramps, designed in the OKLab perceptual colour space.
//!
//! Each ramp is a path of a few control points in OKLCh (lightness L, chroma
//! C, hue h), followed linearly in L, C and h and turned into sRGB. Where a
//! point of the path lies outside the sRGB gamut its chroma is reduced, at the
//! same lightness and hue, until it fits, so lightness is always what the path
//! says.
//!
//! - **Sequential**: lightness rises steadily from 0.30 to 0.96 while the hue
//!   turns from a deep pine green through sea blue and periwinkle to a pale
//!   rose: high values are light.
//! - **Diverging**: two arms of equal lightness for equal distances from the
//!   centre, a petrol blue (low) and a burnt copper (high), meeting in a
//!   neutral near-white (L 0.97, no chroma) at the centre.
//!
//! OKLab: B. Ottosson, 2020, "A perceptual color space for image processing"
//! (docs/references.md). Colour-vision deficiency is checked in the tests with
//! the simulation of Machado, Oliveira and Fernandes (2009).

use std::sync::OnceLock;

/// Entries of each ramp's lookup table.
pub const RAMP_SIZE: usize = 256;

/// One control point: position along the ramp (0..1), OKLab L, chroma, hue (degrees).
type Stop = (f64, f64, f64, f64);

/// The sequential ramp's path.
const SEQUENTIAL: [Stop; 4] = [
    (0.00, 0.30, 0.070, 160.0),
    (0.35, 0.53, 0.100, 215.0),
    (0.70, 0.76, 0.090, 285.0),
    (1.00, 0.96, 0.045, 350.0),
];

/// The diverging ramp's low arm, end to centre.
const DIVERGING_LOW: [Stop; 2] = [(0.0, 0.40, 0.105, 235.0), (0.5, 0.97, 0.0, 235.0)];
/// The diverging ramp's high arm, centre to end.
const DIVERGING_HIGH: [Stop; 2] = [(0.5, 0.97, 0.0, 42.0), (1.0, 0.40, 0.125, 42.0)];

/// OKLab (L, a, b) to linear-light sRGB (Ottosson 2020, the published matrices).
pub fn oklab_to_linear(l: f64, a: f64, b: f64) -> [f64; 3] {
    let l_ = l + 0.396_337_777_4 * a + 0.215_803_757_3 * b;
    let m_ = l - 0.105_561_345_8 * a - 0.063_854_172_8 * b;
    let s_ = l - 0.089_484_177_5 * a - 1.291_485_548_0 * b;
    let (l3, m3, s3) = (l_.powi(3), m_.powi(3), s_.powi(3));
    [
        4.076_741_662_1 * l3 - 3.307_711_591_3 * m3 + 0.230_969_929_2 * s3,
        -1.268_438_004_6 * l3 + 2.609_757_401_1 * m3 - 0.341_319_396_5 * s3,
        -0.004_196_086_3 * l3 - 0.703_418_614_7 * m3 + 1.707_614_701_0 * s3,
    ]
}

/// Linear-light sRGB to OKLab (Ottosson 2020).
pub fn linear_to_oklab(c: [f64; 3]) -> [f64; 3] {
    let [r, g, b] = c;
    let l = 0.412_221_470_8 * r + 0.536_332_536_3 * g + 0.051_445_992_9 * b;
    let m = 0.211_903_498_2 * r + 0.680_699_545_1 * g + 0.107_396_956_6 * b;
    let s = 0.088_302_461_9 * r + 0.281_718_837_6 * g + 0.629_978_700_5 * b;
    let (l_, m_, s_) = (l.cbrt(), m.cbrt(), s.cbrt());
    [
        0.210_454_255_3 * l_ + 0.793_617_785_0 * m_ - 0.004_072_046_8 * s_,
        1.977_998_495_1 * l_ - 2.428_592_205_0 * m_ + 0.450_593_709_9 * s_,
        0.025_904_037_1 * l_ + 0.782_771_766_2 * m_ - 0.808_675_766_0 * s_,
    ]
}

/// sRGB transfer function (IEC 61966-2-1), 0..1 linear to 0..1 encoded.
pub fn encode(x: f64) -> f64 {
    let x = x.clamp(0.0, 1.0);
    if x <= 0.003_130_8 {
        12.92 * x
    } else {
        1.055 * x.powf(1.0 / 2.4) - 0.055
    }
}

/// Inverse of [`encode`].
pub fn decode(x: f64) -> f64 {
    if x <= 0.040_45 {
        x / 12.92
    } else {
        ((x + 0.055) / 1.055).powf(2.4)
    }
}

/// Linear light of each 8-bit sRGB level.
pub fn linear_table() -> &'static [f64; 256] {
    static TABLE: OnceLock<[f64; 256]> = OnceLock::new();
    TABLE.get_or_init(|| std::array::from_fn(|i| decode(i as f64 / 255.0)))
}

/// 8-bit sRGB to linear light.
pub fn to_linear(c: [u8; 3]) -> [f64; 3] {
    let t = linear_table();
    c.map(|v| t[usize::from(v)])
}

/// Linear light (0..1) to the nearest 8-bit sRGB value: the same as
/// `(encode(x) * 255).round()`, found among the 255 linear values halfway
/// between neighbouring 8-bit values instead of through a power.
pub fn encode_u8(x: f64) -> u8 {
    static HALFWAY: OnceLock<[f64; 255]> = OnceLock::new();
    let h = HALFWAY.get_or_init(|| std::array::from_fn(|v| decode((v as f64 + 0.5) / 255.0)));
    h.partition_point(|&t| t <= x) as u8
}

fn in_gamut(c: [f64; 3]) -> bool {
    c.iter().all(|&v| (-1e-9..=1.0 + 1e-9).contains(&v))
}

/// The sRGB colour of OKLCh (l, c, h), chroma reduced into the gamut by bisection.
fn lch_to_srgb8(l: f64, c: f64, h: f64) -> [u8; 3] {
    let (sin, cos) = h.to_radians().sin_cos();
    let at = |c: f64| oklab_to_linear(l, c * cos, c * sin);
    let rgb = if in_gamut(at(c)) {
        at(c)
    } else {
        let (mut lo, mut hi) = (0.0, c);
        for _ in 0..30 {
            let mid = 0.5 * (lo + hi);
            if in_gamut(at(mid)) {
                lo = mid;
            } else {
                hi = mid;
            }
        }
        at(lo)
    };
    rgb.map(|v| (encode(v) * 255.0).round() as u8)
}

/// Point `t` of a path of stops (t within the stops' span).
fn along(stops: &[Stop], t: f64) -> (f64, f64, f64) {
    let mut pair = (stops[0], stops[stops.len() - 1]);
    for w in stops.windows(2) {
        if t <= w[1].0 {
            pair = (w[0], w[1]);
            break;
        }
    }
    let ((t0, l0, c0, h0), (t1, l1, c1, h1)) = pair;
    let f = if t1 > t0 {
        ((t - t0) / (t1 - t0)).clamp(0.0, 1.0)
    } else {
        0.0
    };
    (l0 + f * (l1 - l0), c0 + f * (c1 - c0), h0 + f * (h1 - h0))
}

fn build(stops_for: impl Fn(f64) -> (f64, f64, f64)) -> Vec<[u8; 3]> {
    (0..RAMP_SIZE)
        .map(|i| {
            let (l, c, h) = stops_for(i as f64 / (RAMP_SIZE - 1) as f64);
            lch_to_srgb8(l, c, h)
        })
        .collect()
}

/// The sequential ramp, low end first.
pub fn sequential() -> &'static [[u8; 3]] {
    static LUT: OnceLock<Vec<[u8; 3]>> = OnceLock::new();
    LUT.get_or_init(|| build(|t| along(&SEQUENTIAL, t)))
}

/// The diverging ramp, low end first.
pub fn diverging() -> &'static [[u8; 3]] {
    static LUT: OnceLock<Vec<[u8; 3]>> = OnceLock::new();
    LUT.get_or_init(|| {
        build(|t| {
            if t <= 0.5 {
                along(&DIVERGING_LOW, t)
            } else {
                along(&DIVERGING_HIGH, t)
            }
        })
    })
}

/// Colour at position `t` (0..1) of a ramp.
pub fn at(ramp: &[[u8; 3]], t: f64) -> [u8; 3] {
    let n = ramp.len();
    let k = (t.clamp(0.0, 1.0) * (n - 1) as f64).round() as usize;
    ramp[k.min(n - 1)]
}

/// OKLab lightness of an 8-bit sRGB colour (0 black, 1 white).
pub fn lightness(c: [u8; 3]) -> f64 {
    linear_to_oklab(to_linear(c))[0]
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Simulated colour-vision deficiency, severity 1 (dichromacy), as
    /// matrices on linear-light sRGB: Machado, Oliveira and Fernandes (2009),
    /// "A physiologically-based model for simulation of color vision
    /// deficiency", IEEE TVCG 15(6), 1291-1298, table of matrices (from memory;
    /// checked independently against the `colorspacious` package in
    /// tests/python/test_quicklook_colours.py).
    const CVD: [(&str, [[f64; 3]; 3]); 3] = [
        (
            "protanopia",
            [
                [0.152_286, 1.052_583, -0.204_868],
                [0.114_503, 0.786_281, 0.099_216],
                [-0.003_882, -0.048_116, 1.051_998],
            ],
        ),
        (
            "deuteranopia",
            [
                [0.367_322, 0.860_646, -0.227_968],
                [0.280_085, 0.672_501, 0.047_413],
                [-0.011_820, 0.042_940, 0.968_881],
            ],
        ),
        (
            "tritanopia",
            [
                [1.255_528, -0.076_749, -0.178_779],
                [-0.078_411, 0.930_809, 0.147_602],
                [0.004_733, 0.691_367, 0.303_900],
            ],
        ),
    ];

    fn simulate(m: &[[f64; 3]; 3], c: [u8; 3]) -> [f64; 3] {
        let v = to_linear(c);
        let out =
            [0, 1, 2].map(|r| (m[r][0] * v[0] + m[r][1] * v[1] + m[r][2] * v[2]).clamp(0.0, 1.0));
        linear_to_oklab(out)
    }

    fn delta(a: [f64; 3], b: [f64; 3]) -> f64 {
        ((a[0] - b[0]).powi(2) + (a[1] - b[1]).powi(2) + (a[2] - b[2]).powi(2)).sqrt()
    }

    /// 33 samples of a ramp in OKLab, as seen normally and with each deficiency.
    fn views(ramp: &[[u8; 3]]) -> Vec<(&'static str, Vec<[f64; 3]>)> {
        let samples: Vec<[u8; 3]> = (0..=32).map(|i| at(ramp, i as f64 / 32.0)).collect();
        let mut out = vec![(
            "normal",
            samples
                .iter()
                .map(|&c| linear_to_oklab(to_linear(c)))
                .collect(),
        )];
        for (name, m) in &CVD {
            out.push((*name, samples.iter().map(|&c| simulate(m, c)).collect()));
        }
        out
    }

    #[test]
    fn oklab_round_trips_and_matches_published_white_and_primaries() {
        // Ottosson (2020): white is L 1, a 0, b 0; sRGB red is about
        // (0.628, 0.225, 0.126) (from memory, to three decimals).
        let w = linear_to_oklab([1.0, 1.0, 1.0]);
        assert!(
            (w[0] - 1.0).abs() < 1e-4 && w[1].abs() < 1e-4 && w[2].abs() < 1e-4,
            "{w:?}"
        );
        let r = linear_to_oklab([1.0, 0.0, 0.0]);
        assert!(
            (r[0] - 0.628).abs() < 2e-3
                && (r[1] - 0.225).abs() < 2e-3
                && (r[2] - 0.126).abs() < 2e-3,
            "{r:?}"
        );
        for c in [[0.2, 0.5, 0.9], [0.9, 0.1, 0.05], [0.01, 0.02, 0.03]] {
            let back = {
                let [l, a, b] = linear_to_oklab(c);
                oklab_to_linear(l, a, b)
            };
            for k in 0..3 {
                assert!((back[k] - c[k]).abs() < 1e-6, "{c:?} -> {back:?}");
            }
        }
    }

    #[test]
    fn the_8_bit_encoding_by_table_is_the_transfer_function_rounded() {
        // IEC 61966-2-1: every 8-bit value survives decode then encode, and
        // any linear value lands on round(255 encode(x)).
        for v in 0..=255u8 {
            assert_eq!(encode_u8(linear_table()[usize::from(v)]), v);
        }
        for k in 0..=100_003u32 {
            let x = f64::from(k) / 100_003.0;
            let want = (encode(x) * 255.0).round() as u8;
            assert_eq!(encode_u8(x), want, "{x}");
        }
        assert_eq!((encode_u8(-0.5), encode_u8(1.5)), (0, 255));
    }

    #[test]
    fn sequential_lightness_rises_steadily_for_every_kind_of_colour_vision() {
        for (who, v) in views(sequential()) {
            let l: Vec<f64> = v.iter().map(|c| c[0]).collect();
            for w in l.windows(2) {
                // Each 1/32 of the ramp is at least 0.012 lighter than the last
                // (the path rises 0.66 in all, 0.0206 a step): dark-to-light
                // order survives every deficiency.
                assert!(w[1] - w[0] > 0.012, "{who}: {l:?}");
            }
            assert!(l[32] - l[0] > 0.55, "{who}: span {}", l[32] - l[0]);
        }
        // In normal vision the steps are near even: perceptual distance of
        // successive 1/32 steps within 35 % of their mean.
        let (_, v) = &views(sequential())[0];
        let d: Vec<f64> = v.windows(2).map(|w| delta(w[0], w[1])).collect();
        let mean = d.iter().sum::<f64>() / d.len() as f64;
        assert!(d.iter().all(|x| (x - mean).abs() < 0.35 * mean), "{d:?}");
    }

    #[test]
    fn diverging_arms_are_even_and_their_ends_stay_apart_for_every_kind_of_colour_vision() {
        for (who, v) in views(diverging()) {
            let l: Vec<f64> = v.iter().map(|c| c[0]).collect();
            // Darker away from the centre on both arms.
            for k in 0..16 {
                assert!(l[k + 1] > l[k] + 0.01, "{who} low arm at {k}: {l:?}");
                assert!(l[31 - k] > l[32 - k] + 0.01, "{who} high arm at {k}: {l:?}");
            }
            // The two ends and the pair a quarter from each end are told apart
            // (not only by lightness: their OKLab distance is mostly hue).
            assert!(
                delta(v[0], v[32]) > 0.08,
                "{who}: ends {:.3}",
                delta(v[0], v[32])
            );
            assert!(
                delta(v[8], v[24]) > 0.05,
                "{who}: quarters {:.3}",
                delta(v[8], v[24])
            );
        }
        // Equal distances from the centre have equal lightness (normal vision).
        let l: Vec<f64> = (0..=32)
            .map(|i| lightness(at(diverging(), i as f64 / 32.0)))
            .collect();
        for k in 0..16 {
            assert!(
                (l[k] - l[32 - k]).abs() < 0.01,
                "{k}: {} vs {}",
                l[k],
                l[32 - k]
            );
        }
    }

    #[test]
    fn the_ramps_hold_no_neutral_grey() {
        // Missing points are drawn in neutral grey: no ramp colour may pass
        // for one (chroma of every sequential colour, and of the diverging
        // arms away from their white centre, at least 0.02).
        let chroma = |c: [u8; 3]| {
            let [_, a, b] = linear_to_oklab(to_linear(c));
            a.hypot(b)
        };
        assert!(sequential().iter().all(|&c| chroma(c) > 0.02));
        let d = diverging();
        for (i, &c) in d.iter().enumerate() {
            let from_centre = (i as f64 / (RAMP_SIZE - 1) as f64 - 0.5).abs();
            if from_centre > 0.15 {
                assert!(chroma(c) > 0.02, "{i}: {c:?}");
            }
        }
    }
}
