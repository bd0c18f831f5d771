//! Decoding of field values through the `grib` crate's packing decoders.
//!
//! In: the bytes of a file and one catalogue entry. Out: the field's values as
//! `f32` in leeward's orientation (rows south to north), NaN at points the
//! bitmap marks missing; or a [`DecodeError`] naming the reason. The crate is
//! given owned copies of sections 5, 6 and 7 so fields decode in parallel; a
//! panic inside it is caught and reported as a decode error, never passed on.

use std::panic::{catch_unwind, AssertUnwindSafe};

use thiserror::Error;

use super::catalogue::FieldEntry;
use super::grid::Scan;

/// Why a field's values could not be had.
#[derive(Debug, Error, Clone, PartialEq)]
pub enum DecodeError {
    /// The catalogue already found the field unusable.
    #[error("{0}")]
    Unusable(String),
    /// The packing decoder refused the data.
    #[error("data representation template 5.{template}: {reason}")]
    Packing {
        /// Template number (code table 5.0).
        template: u16,
        /// The decoder's words.
        reason: String,
    },
    /// The number of values does not match the grid.
    #[error("decoded {got} values but the grid has {want} points")]
    Count {
        /// Values decoded.
        got: usize,
        /// Points on the grid.
        want: usize,
    },
}

/// Data representation templates the decoder reads (code table 5.0).
pub const SUPPORTED_PACKINGS: [u16; 7] = [0, 2, 3, 40, 41, 42, 200];

/// Largest field leeward decodes, in points (a 0.025-degree global grid has 104 M).
pub const MAX_POINTS: usize = 200_000_000;

/// Decode one field's values in file order (NaN where the bitmap says missing).
pub fn decode_raw(bytes: &[u8], f: &FieldEntry) -> Result<Vec<f32>, DecodeError> {
    if let Some(r) = &f.unusable {
        return Err(DecodeError::Unusable(r.clone()));
    }
    // Lengths a file states are checked before anything is allocated from them.
    if f.num_points == 0 || f.num_points > MAX_POINTS {
        return Err(DecodeError::Unusable(format!(
            "section 3 claims {} grid points (leeward reads 1 to {MAX_POINTS})",
            f.num_points
        )));
    }
    let encoded = bytes
        .get(f.sect5.clone())
        .and_then(|s| super::bytes::u32_at(s, 5))
        .unwrap_or(0) as usize;
    if encoded > f.num_points {
        return Err(DecodeError::Unusable(format!(
            "section 5 claims {encoded} packed values for a grid of {} points",
            f.num_points
        )));
    }
    if f.bitmap_indicator == 0 || f.bitmap_indicator == 254 {
        let bitmap_octets = f.sect6.len().saturating_sub(6);
        if bitmap_octets * 8 < f.num_points {
            return Err(DecodeError::Unusable(format!(
                "bitmap of {bitmap_octets} octets is too short for {} points",
                f.num_points
            )));
        }
    }
    if !SUPPORTED_PACKINGS.contains(&f.data_template) {
        return Err(DecodeError::Packing {
            template: f.data_template,
            reason: "packing not supported".into(),
        });
    }
    let get = |r: &std::ops::Range<usize>| bytes.get(r.clone()).map(<[u8]>::to_vec);
    let (Some(s5), Some(s6), Some(s7)) = (get(&f.sect5), get(&f.sect6), get(&f.sect7)) else {
        return Err(DecodeError::Unusable(
            "section ranges outside the file".into(),
        ));
    };
    if let Err(reason) = check_packed_sizes(f.data_template, &s5, &s7, f.num_points) {
        return Err(DecodeError::Packing {
            template: f.data_template,
            reason,
        });
    }
    let mut s6 = s6;
    // A field that reuses the previous bitmap (indicator 254) was pointed at that
    // bitmap's section by the catalogue; it is an ordinary bitmap section.
    if s6.len() > 5 && f.bitmap_indicator == 254 {
        s6[5] = 0;
    }
    let template = f.data_template;
    let n = f.num_points;
    let mut s5 = s5;
    // Octet 21 of these templates, type of original field values (code table 5.1),
    // only says whether the producer held floats or integers; the unpacking
    // Y = (R + X 2^E) / 10^D is the same, but the crate refuses "integer".
    if matches!(template, 0 | 2 | 3 | 40 | 41 | 42) && s5.get(20) == Some(&1) {
        s5[20] = 0;
    }
    if let Some(v) = constant_field(template, &s5, &s6, n) {
        return Ok(v);
    }
    // Simple and complex packing are read directly, bit for bit as the crate
    // would; forms the direct path does not read go on to the crate.
    if matches!(template, 0 | 2 | 3) {
        // It is written never to panic (and property-tested so); were it to,
        // the field is refused like one the crate stops on.
        let direct = catch_unwind(AssertUnwindSafe(|| {
            super::unpack::unpack(template, &s5, &s6, &s7, n)
        }))
        .unwrap_or_else(|_| {
            Some(Err(
                "the packed data are inconsistent (decoder stopped)".into()
            ))
        });
        match direct {
            Some(Ok(v)) if v.len() == n => return Ok(v),
            Some(Ok(v)) => {
                return Err(DecodeError::Count {
                    got: v.len(),
                    want: n,
                })
            }
            Some(Err(reason)) => return Err(DecodeError::Packing { template, reason }),
            None => {}
        }
    }
    let run = || -> Result<Vec<f32>, String> {
        let dec = grib::Grib2SubmessageDecoder::new(n, s5, s6, s7).map_err(|e| e.to_string())?;
        let vals = dec.dispatch().map_err(|e| e.to_string())?;
        Ok(vals.collect())
    };
    let values = match catch_unwind(AssertUnwindSafe(run)) {
        Ok(Ok(v)) => v,
        Ok(Err(reason)) => return Err(DecodeError::Packing { template, reason }),
        Err(_) => {
            return Err(DecodeError::Packing {
                template,
                reason: "the packed data are inconsistent (decoder stopped)".into(),
            })
        }
    };
    if values.len() != n {
        return Err(DecodeError::Count {
            got: values.len(),
            want: n,
        });
    }
    Ok(values)
}

/// Sizes stated inside the packed data are checked against the grid before a
/// decoder allocates from them: a lying size must be an error, not an attempt
/// to allocate terabytes (found by the corrupt-input property test).
fn check_packed_sizes(template: u16, s5: &[u8], s7: &[u8], n: usize) -> Result<(), String> {
    use super::bytes::u32_at;
    let payload = s7.get(5..).unwrap_or(&[]);
    match template {
        // Complex packing: number of groups NG, octets 32-35 of section 5.
        2 | 3 => {
            let ng = u32_at(s5, 31).unwrap_or(0) as usize;
            if ng > n {
                return Err(format!("{ng} groups for {n} points"));
            }
        }
        // JPEG 2000 code stream: SOC then SIZ (ISO/IEC 15444-1 annex A.5.1).
        40 if !payload.is_empty() => {
            let at = payload
                .windows(4)
                .take(256)
                .position(|w| w == [0xff, 0x4f, 0xff, 0x51])
                .ok_or("no JPEG 2000 code stream header (SOC, SIZ) in section 7")?;
            let siz = &payload[at + 4..];
            let get = |k: usize| u32_at(siz, 4 + 4 * k).map(|v| v as usize);
            let (Some(xs), Some(ys), Some(xo), Some(yo), Some(xt), Some(yt)) =
                (get(0), get(1), get(2), get(3), get(4), get(5))
            else {
                return Err("JPEG 2000 size marker cut short".into());
            };
            let (w, h) = (xs.saturating_sub(xo), ys.saturating_sub(yo));
            if w.saturating_mul(h) > n || xt.min(xs).saturating_mul(yt.min(ys)) > n.max(1) * 4 {
                return Err(format!(
                    "JPEG 2000 image of {w} x {h} (tiles {xt} x {yt}) for {n} points"
                ));
            }
        }
        // PNG: IHDR width and height (ISO/IEC 15948).
        41 if payload.len() >= 24 => {
            let (w, h) = (
                u32_at(payload, 16).unwrap_or(0) as usize,
                u32_at(payload, 20).unwrap_or(0) as usize,
            );
            if w.saturating_mul(h) > n {
                return Err(format!("PNG image of {w} x {h} for {n} points"));
            }
        }
        _ => {}
    }
    Ok(())
}

/// A field packed with zero bits per value holds one value everywhere:
/// Y = R / 10^D (WMO-No. 306, templates 5.0-5.3 and 5.40-5.42 share octets
/// 12-20: reference value R, binary scale E, decimal scale D, bits per value).
/// Section 7 is then empty, which the crate's complex-packing decoder refuses.
fn constant_field(template: u16, s5: &[u8], s6: &[u8], n: usize) -> Option<Vec<f32>> {
    use super::bytes::{f32_at, u16_at, u8_at};
    if !matches!(template, 0 | 2 | 3 | 40 | 41 | 42) || u8_at(s5, 19)? != 0 {
        return None;
    }
    let r = f64::from(f32_at(s5, 11)?);
    let d = u16_at(s5, 17)?;
    let d = if d & 0x8000 != 0 {
        -i32::from(d & 0x7fff)
    } else {
        i32::from(d)
    };
    let value = (r / 10f64.powi(d)) as f32;
    match u8_at(s6, 5)? {
        255 => Some(vec![value; n]),
        0 => {
            let bits = s6.get(6..)?;
            if bits.len() * 8 < n {
                return None;
            }
            Some(
                (0..n)
                    .map(|k| {
                        if bits[k / 8] & (0x80 >> (k % 8)) != 0 {
                            value
                        } else {
                            f32::NAN
                        }
                    })
                    .collect(),
            )
        }
        _ => None,
    }
}

/// Decode one field and put its values in leeward's orientation.
pub fn decode(bytes: &[u8], f: &FieldEntry, scan: &Scan) -> Result<Vec<f32>, DecodeError> {
    let raw = decode_raw(bytes, f)?;
    if raw.len() != scan.ni * scan.nj {
        return Err(DecodeError::Count {
            got: raw.len(),
            want: scan.ni * scan.nj,
        });
    }
    Ok(scan.normalise(&raw))
}
