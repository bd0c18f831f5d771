//! Direct unpacking of simple packing and complex packing, with and without
//! spatial differencing (GRIB2 data representation templates 5.0, 5.2, 5.3 with
//! data templates 7.0, 7.2, 7.3).
//!
//! In: sections 5, 6 and 7 of one field and its number of grid points. Out:
//! the field's values in file order as `f32`, NaN where the bitmap says
//! missing; `None` for any form this module does not read (the caller then uses
//! the `grib` crate), or `Some(Err(reason))` when the data contradict
//! themselves. The arithmetic follows the `grib` crate (0.20) step for step, so
//! the values are bit for bit the crate's; the loops are leeward's own: one
//! pass over the descriptors to size and check, one pass over the packed
//! values, no allocation per group. Never panics: every index is checked.
//!
//! Octet positions in this file are 0-based within a section; WMO-No. 306
//! (Manual on Codes, FM 92 GRIB edition 2) counts from 1.

use super::bytes::{f32_at, u16_at, u32_at, u8_at};

/// Unpack one field when its packing is one this module reads.
///
/// Source: WMO-No. 306, templates 5.0, 5.2, 5.3 (section 5), 6 (bitmap,
/// indicator 0 or 255) and 7.0, 7.2, 7.3 (section 7). `template` is the data
/// representation template number the catalogue found; it must agree with
/// octets 10-11 of `s5`.
pub fn unpack(
    template: u16,
    s5: &[u8],
    s6: &[u8],
    s7: &[u8],
    n: usize,
) -> Option<Result<Vec<f32>, String>> {
    if !matches!(template, 0 | 2 | 3) || u16_at(s5, 9)? != template || u8_at(s5, 4)? != 5 {
        return None;
    }
    if !section_is_whole(s6, 6) || !section_is_whole(s7, 7) {
        return None;
    }
    let head = Head::read(s5)?;
    // Code table 5.1: only "floating point" (0) is unpacked the crate's way;
    // the caller already turned "integer" (1) into 0.
    if head.original_type != 0 {
        return None;
    }
    let bitmap = match u8_at(s6, 5)? {
        255 if s6.len() == 6 => None,
        0 => Some(s6.get(6..)?),
        _ => return None,
    };
    let packed = head.packed;
    if let Err(e) = check_bitmap(bitmap, n, packed) {
        return Some(Err(e));
    }
    let payload = s7.get(5..)?;
    let values = match template {
        0 => simple(&head, payload)?,
        _ => complex(template, &head, s5, payload, n)?,
    };
    Some(values.map(|v| spread(v, bitmap, n)))
}

/// True when the section's own header (octets 1-4 length, 5 number) matches
/// the slice: the crate refuses a section that does not (WMO-No. 306, the
/// section layout shared by all sections).
fn section_is_whole(s: &[u8], number: u8) -> bool {
    u32_at(s, 0).map(|l| l as usize) == Some(s.len()) && u8_at(s, 4) == Some(number)
}

/// The simple-packing part of section 5 shared by templates 5.0, 5.2, 5.3
/// (WMO-No. 306, template 5.0 octets 6-21).
struct Head {
    /// Octets 6-9: number of values packed in section 7.
    packed: usize,
    /// Octets 12-15: reference value R.
    reference: f32,
    /// Octets 16-17: binary scale factor E (sign and magnitude).
    binary: i32,
    /// Octets 18-19: decimal scale factor D (sign and magnitude).
    decimal: i32,
    /// Octet 20: bits per packed value (per group reference in complex packing).
    bits: u8,
    /// Octet 21: type of original field values (code table 5.1).
    original_type: u8,
}

impl Head {
    /// Read octets 6-21 of section 5 (WMO-No. 306, template 5.0).
    fn read(s5: &[u8]) -> Option<Head> {
        Some(Head {
            packed: u32_at(s5, 5)? as usize,
            reference: f32_at(s5, 11)?,
            binary: sign_magnitude_16(u16_at(s5, 15)?),
            decimal: sign_magnitude_16(u16_at(s5, 17)?),
            bits: u8_at(s5, 19)?,
            original_type: u8_at(s5, 20)?,
        })
    }

    /// The scaling Y = (R + X 2^E) 10^-D in single precision, with the factors
    /// and the order of operations of the `grib` crate's simple-packing decoder
    /// (WMO-No. 306, template 5.0 note on the unpacking formula).
    fn scale(&self) -> Scale {
        Scale {
            reference: self.reference,
            binary: 2_f32.powi(self.binary),
            decimal: 10_f32.powi(-self.decimal),
        }
    }
}

/// A GRIB2 signed 2-octet integer: top bit sign, 15 bits magnitude
/// (WMO-No. 306, regulation 92.1.5).
fn sign_magnitude_16(v: u16) -> i32 {
    let mag = i32::from(v & 0x7fff);
    if v & 0x8000 != 0 {
        -mag
    } else {
        mag
    }
}

/// A GRIB2 signed integer of 1 to 4 octets, sign and magnitude (WMO-No. 306,
/// regulation 92.1.5); `None` for other widths.
fn sign_magnitude(b: &[u8]) -> Option<i64> {
    if b.is_empty() || b.len() > 4 {
        return None;
    }
    let raw = b.iter().fold(0u64, |v, &x| (v << 8) | u64::from(x));
    let top = 1u64 << (8 * b.len() - 1);
    let mag = (raw & (top - 1)) as i64;
    Some(if raw & top != 0 { -mag } else { mag })
}

/// An unsigned big-endian integer of 1 to 4 octets (WMO-No. 306, template 7.3:
/// the first values of spatial differencing are unsigned).
fn unsigned(b: &[u8]) -> i64 {
    b.iter().fold(0i64, |v, &x| (v << 8) | i64::from(x))
}

/// Single-precision unpacking factors (WMO-No. 306, template 5.0).
#[derive(Clone, Copy)]
struct Scale {
    reference: f32,
    binary: f32,
    decimal: f32,
}

impl Scale {
    /// Y = (R + X 2^E) 10^-D for one packed integer X.
    #[inline]
    fn apply(self, x: f32) -> f32 {
        (self.reference + x * self.binary) * self.decimal
    }
}

/// The bitmap, when there is one, must be long enough for every grid point
/// and mark exactly as many points present as section 5 says were packed;
/// without one, every point is packed (WMO-No. 306, section 6 and template
/// 5.0 octets 6-9).
fn check_bitmap(bitmap: Option<&[u8]>, n: usize, packed: usize) -> Result<(), String> {
    let Some(bits) = bitmap else {
        if packed != n {
            return Err(format!(
                "section 5 says {packed} values are packed but the grid has {n} points and no bitmap"
            ));
        }
        return Ok(());
    };
    let (whole, rest) = (n / 8, n % 8);
    let need = whole + usize::from(rest > 0);
    let Some(used) = bits.get(..need) else {
        return Err(format!(
            "the bitmap has {} octets, {n} points need {need}",
            bits.len()
        ));
    };
    let mut present: usize = used
        .get(..whole)
        .unwrap_or(&[])
        .iter()
        .map(|b| b.count_ones() as usize)
        .sum();
    if rest > 0 {
        present += used
            .get(whole)
            .map_or(0, |b| (b >> (8 - rest)).count_ones()) as usize;
    }
    if present != packed {
        return Err(format!(
            "the bitmap marks {present} points present but section 5 says {packed} values are packed"
        ));
    }
    Ok(())
}

/// Put the packed values at the points the bitmap marks present, NaN
/// elsewhere (WMO-No. 306, section 6: one bit per point, most significant bit
/// first, 1 present). Without a bitmap the values are the field.
fn spread(values: Vec<f32>, bitmap: Option<&[u8]>, n: usize) -> Vec<f32> {
    let Some(bits) = bitmap else {
        return values;
    };
    let mut out = vec![f32::NAN; n];
    let mut next = values.into_iter();
    for (k, slot) in out.iter_mut().enumerate() {
        let on = bits.get(k / 8).is_some_and(|b| b & (0x80 >> (k % 8)) != 0);
        if on {
            match next.next() {
                Some(v) => *slot = v,
                None => break,
            }
        }
    }
    out
}

/// Big-endian bit reader over a byte slice: reads up to 32 bits at a time
/// through a 64-bit window (GRIB2 packs values most significant bit first,
/// WMO-No. 306, regulation 92.1.4; the window technique from memory). Bits past
/// the end of the slice read as zero; callers check lengths first.
struct Bits<'a> {
    data: &'a [u8],
    at: usize,
}

impl<'a> Bits<'a> {
    /// A reader starting at octet `start` of `data`.
    fn new(data: &'a [u8], start: usize) -> Bits<'a> {
        Bits {
            data,
            at: start.saturating_mul(8),
        }
    }

    /// The next `width` bits (0 to 32) as an unsigned integer.
    #[inline]
    fn take(&mut self, width: u32) -> u32 {
        if width == 0 {
            return 0;
        }
        let byte = self.at / 8;
        let shift = (self.at % 8) as u32;
        let window = match self.data.get(byte..).and_then(|s| s.first_chunk::<8>()) {
            Some(w) => u64::from_be_bytes(*w),
            None => (0..8).fold(0u64, |w, i| {
                let b = byte.checked_add(i).and_then(|j| self.data.get(j));
                (w << 8) | u64::from(b.copied().unwrap_or(0))
            }),
        };
        self.at = self.at.saturating_add(width as usize);
        ((window << shift) >> (64 - width.min(32))) as u32
    }
}

/// Template 5.0 with data template 7.0: `packed` values of `bits` bits each,
/// scaled one by one (WMO-No. 306, templates 5.0 and 7.0). Zero bits per value
/// give R 10^-D everywhere, as the crate computes it; more than 32 bits per
/// value is left to the crate (`None`).
fn simple(head: &Head, payload: &[u8]) -> Option<Result<Vec<f32>, String>> {
    let m = head.packed;
    if head.bits == 0 {
        let v = head.reference * 10_f32.powi(-head.decimal);
        return Some(Ok(vec![v; m]));
    }
    if head.bits > 32 {
        return None;
    }
    let width = u32::from(head.bits);
    let need = m.saturating_mul(width as usize);
    if need > payload.len().saturating_mul(8) {
        return Some(Err(format!(
            "section 7 holds {} octets but {m} values of {width} bits need {}",
            payload.len(),
            need.div_ceil(8)
        )));
    }
    let scale = head.scale();
    let mut r = Bits::new(payload, 0);
    Some(Ok((0..m)
        .map(|_| scale.apply(r.take(width) as f32))
        .collect()))
}

/// Section 5 octets 22-47 of templates 5.2 and 5.3 (WMO-No. 306).
struct Groups {
    /// Octet 23: missing value management (code table 5.5).
    missing: u8,
    /// Octets 32-35: number of groups NG.
    count: usize,
    /// Octet 36: reference for group widths.
    width_ref: u32,
    /// Octet 37: bits per group width.
    width_bits: u32,
    /// Octets 38-41: reference for group lengths.
    len_ref: u32,
    /// Octet 42: length increment.
    len_inc: u32,
    /// Octets 43-46: true length of the last group.
    len_last: u32,
    /// Octet 47: bits per scaled group length.
    len_bits: u32,
}

/// Templates 5.2 and 5.3 with data templates 7.2 and 7.3: group references,
/// widths and lengths, then each group's values; for 5.3 the extra descriptors
/// (first values and overall minimum) come first and the differencing is
/// undone afterwards (WMO-No. 306, templates 5.2, 5.3, 7.2, 7.3). `None` for
/// what the crate refuses itself (group splitting other than 1, missing value
/// management above 2, order of differencing other than 1 or 2, more than 31
/// bits per reference or 32 per descriptor), so its own wording reaches the
/// operator; a group width of 32 bits or more is an error, as in the crate.
fn complex(
    template: u16,
    head: &Head,
    s5: &[u8],
    payload: &[u8],
    n: usize,
) -> Option<Result<Vec<f32>, String>> {
    if u8_at(s5, 21)? != 1 {
        return None;
    }
    let g = Groups {
        missing: u8_at(s5, 22)?,
        count: u32_at(s5, 31)? as usize,
        width_ref: u32::from(u8_at(s5, 35)?),
        width_bits: u32::from(u8_at(s5, 36)?),
        len_ref: u32_at(s5, 37)?,
        len_inc: u32::from(u8_at(s5, 41)?),
        len_last: u32_at(s5, 42)?,
        len_bits: u32::from(u8_at(s5, 46)?),
    };
    if g.missing > 2 {
        return None;
    }
    // Template 5.3 octets 48-49: order of spatial differencing (code table
    // 5.6) and octets per extra descriptor in section 7 (template 7.3).
    let (order, start, minimum, firsts) = if template == 3 {
        let order = u8_at(s5, 47)?;
        let octets = usize::from(u8_at(s5, 48)?);
        if !matches!(order, 1 | 2) || octets == 0 || octets > 4 {
            return None;
        }
        let len = (usize::from(order) + 1) * octets;
        let Some(extra) = payload.get(..len) else {
            return Some(Err(format!(
                "section 7 is too short for the {len} octets of spatial differencing descriptors"
            )));
        };
        let first = |k: usize| extra.get(k * octets..(k + 1) * octets).map(unsigned);
        let min = sign_magnitude(extra.get(usize::from(order) * octets..)?)?;
        let firsts = [first(0)?, if order == 2 { first(1)? } else { 0 }];
        (order, len, min as i32, firsts)
    } else {
        (0, 0, 0, [0, 0])
    };
    if g.count == 0 {
        return Some(Err("section 5 says there are no groups".into()));
    }
    if g.count > n {
        return Some(Err(format!("{} groups for {n} points", g.count)));
    }
    if head.bits > 31 || g.width_bits > 32 || g.len_bits > 32 {
        return None;
    }
    Some(complex_values(
        head, &g, payload, start, minimum, order, firsts,
    ))
}

/// The group loop of [`complex`]: size and check every group, read the values,
/// undo spatial differencing of order `order` (0 for none) and scale
/// (WMO-No. 306, templates 7.2, 7.3; integer types as in the `grib` crate).
fn complex_values(
    head: &Head,
    g: &Groups,
    payload: &[u8],
    start: usize,
    minimum: i32,
    order: u8,
    firsts: [i64; 2],
) -> Result<Vec<f32>, String> {
    let ng = g.count;
    let octets = |bits: u32| -> Result<usize, String> {
        ng.checked_mul(bits as usize)
            .map(|b| b.div_ceil(8))
            .ok_or_else(|| format!("{ng} groups overflow the descriptor sizes"))
    };
    let refs_at = start;
    let widths_at = refs_at
        .checked_add(octets(u32::from(head.bits))?)
        .ok_or("descriptor offsets overflow")?;
    let lens_at = widths_at
        .checked_add(octets(g.width_bits)?)
        .ok_or("descriptor offsets overflow")?;
    let data_at = lens_at
        .checked_add(octets(g.len_bits)?)
        .ok_or("descriptor offsets overflow")?;
    if data_at > payload.len() {
        return Err(format!(
            "section 7 holds {} octets but the descriptors of {ng} groups need {data_at}",
            payload.len()
        ));
    }
    // Pass 1: every group's width and length, checked, and the bits they take.
    let group = |k: usize, w: &mut Bits, l: &mut Bits| -> Result<(u32, usize), String> {
        let width = w
            .take(g.width_bits)
            .checked_add(g.width_ref)
            .ok_or("a group width overflows")?;
        let len = if k + 1 == ng {
            g.len_last
        } else {
            l.take(g.len_bits)
                .checked_mul(g.len_inc)
                .and_then(|v| v.checked_add(g.len_ref))
                .ok_or("a group length overflows")?
        };
        Ok((width, len as usize))
    };
    let (mut w, mut l) = (Bits::new(payload, widths_at), Bits::new(payload, lens_at));
    let mut total_bits: usize = 0;
    let mut total_values: usize = 0;
    for k in 0..ng {
        let (width, len) = group(k, &mut w, &mut l)?;
        if width >= 32 {
            return Err(format!(
                "group {k} has a width of {width} bits (at most 31)"
            ));
        }
        total_bits = (width as usize)
            .checked_mul(len)
            .and_then(|b| total_bits.checked_add(b))
            .ok_or("the group sizes overflow")?;
        total_values = total_values.saturating_add(len);
    }
    let have = payload.len() - data_at;
    if total_bits.div_ceil(8) > have {
        return Err(format!(
            "section 7 holds {have} octets of group values but the groups need {}",
            total_bits.div_ceil(8)
        ));
    }
    let m = head.packed;
    if total_values < m {
        return Err(format!(
            "the groups hold {total_values} values but section 5 says {m} are packed"
        ));
    }
    // Pass 2: the integers, group reference plus value plus overall minimum,
    // the crate's i32 arithmetic, and a flag for missing values (code table 5.5).
    let mut ints: Vec<i32> = Vec::with_capacity(m);
    let mut missing: Vec<bool> = if g.missing > 0 {
        vec![false; m]
    } else {
        Vec::new()
    };
    let (mut w, mut l) = (Bits::new(payload, widths_at), Bits::new(payload, lens_at));
    let mut refs = Bits::new(payload, refs_at);
    let mut vals = Bits::new(payload, data_at);
    let ref_bits = u32::from(head.bits);
    let overflow = || "a value overflows 32-bit integers".to_string();
    for k in 0..ng {
        if ints.len() >= m {
            break;
        }
        let reference = refs.take(ref_bits);
        let (width, len) = group(k, &mut w, &mut l)?;
        let len = len.min(m - ints.len());
        if width == 0 {
            // A constant group: no values in section 7 (template 7.2 note).
            let all_ones = if ref_bits == 0 {
                0
            } else {
                (1u32 << ref_bits) - 1
            };
            let second = all_ones.saturating_sub(1);
            let flag = (g.missing > 0 && reference == all_ones)
                || (g.missing == 2 && all_ones != 0 && reference == second);
            let from = ints.len();
            if flag {
                ints.resize(from + len, 0);
                missing
                    .get_mut(from..from + len)
                    .into_iter()
                    .flatten()
                    .for_each(|x| *x = true);
            } else {
                let v = (reference as i32)
                    .checked_add(minimum)
                    .ok_or_else(overflow)?;
                ints.resize(from + len, v);
            }
            continue;
        }
        if g.missing == 0 {
            for _ in 0..len {
                let x = vals.take(width).wrapping_add(reference) as i32;
                ints.push(x.checked_add(minimum).ok_or_else(overflow)?);
            }
        } else {
            let all_ones = (1u32 << width) - 1;
            let second = all_ones - 1;
            for _ in 0..len {
                let x = vals.take(width);
                let flag = x == all_ones || (g.missing == 2 && x == second);
                if flag {
                    if let Some(f) = missing.get_mut(ints.len()) {
                        *f = true;
                    }
                    ints.push(0);
                } else {
                    let x = x.wrapping_add(reference) as i32;
                    ints.push(x.checked_add(minimum).ok_or_else(overflow)?);
                }
            }
        }
    }
    if ints.len() < m {
        return Err(format!(
            "the groups hold {} values but section 5 says {m} are packed",
            ints.len()
        ));
    }
    let scale = head.scale();
    let is_missing = |k: usize| missing.get(k).copied().unwrap_or(false);
    let mut out: Vec<f32> = Vec::with_capacity(m);
    match order {
        0 => {
            for (k, &x) in ints.iter().enumerate() {
                out.push(if is_missing(k) {
                    f32::NAN
                } else {
                    scale.apply(x as f32)
                });
            }
        }
        _ => {
            // Undo spatial differencing (WMO-No. 306, template 5.3 notes): the
            // first `order` present values are the first values of template
            // 7.3; then y = x + y1 (order 1) or y = x + 2 y1 - y2 (order 2).
            let (mut seen, mut y1, mut y2) = (0u8, 0i64, 0i64);
            let overflow = || "undoing spatial differencing overflows".to_string();
            for (k, &x) in ints.iter().enumerate() {
                if is_missing(k) {
                    out.push(f32::NAN);
                    continue;
                }
                let y = if seen < order {
                    let y = firsts.get(usize::from(seen)).copied().unwrap_or(0);
                    seen += 1;
                    y
                } else if order == 1 {
                    i64::from(x).checked_add(y1).ok_or_else(overflow)?
                } else {
                    y1.checked_mul(2)
                        .and_then(|t| t.checked_sub(y2))
                        .and_then(|t| t.checked_add(i64::from(x)))
                        .ok_or_else(overflow)?
                };
                y2 = y1;
                y1 = y;
                out.push(scale.apply(y as f32));
            }
        }
    }
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Test bit writer, most significant bit first (WMO-No. 306, regulation 92.1.4).
    #[derive(Default)]
    struct Writer {
        out: Vec<u8>,
        used: usize,
    }

    impl Writer {
        fn put(&mut self, v: u32, width: u32) {
            for i in (0..width).rev() {
                if self.used.is_multiple_of(8) {
                    self.out.push(0);
                }
                let bit = ((v >> i) & 1) as u8;
                if let Some(last) = self.out.last_mut() {
                    *last |= bit << (7 - self.used % 8);
                }
                self.used += 1;
            }
        }
        fn pad(&mut self) {
            self.used = self.used.div_ceil(8) * 8;
        }
    }

    fn with_header(number: u8, body: &[u8]) -> Vec<u8> {
        let mut s = ((body.len() + 5) as u32).to_be_bytes().to_vec();
        s.push(number);
        s.extend_from_slice(body);
        s
    }

    /// The `grib` crate's decode, the reference for bit-for-bit checks.
    fn by_crate(n: usize, s5: &[u8], s6: &[u8], s7: &[u8]) -> Vec<f32> {
        let d = grib::Grib2SubmessageDecoder::new(n, s5.to_vec(), s6.to_vec(), s7.to_vec())
            .expect("crate accepts the sections");
        d.dispatch().expect("crate decodes").collect()
    }

    fn same(a: &[f32], b: &[f32]) -> bool {
        a.len() == b.len()
            && a.iter()
                .zip(b)
                .all(|(x, y)| x.to_bits() == y.to_bits() || (x.is_nan() && y.is_nan()))
    }

    #[test]
    fn bit_reader_reads_across_octets_and_zero_past_the_end() {
        let data = [0b1010_1100, 0xff, 0x00, 0x12, 0x34, 0x56, 0x78, 0x9a, 0xbc];
        let mut r = Bits::new(&data, 0);
        assert_eq!(r.take(3), 0b101);
        assert_eq!(r.take(0), 0);
        assert_eq!(r.take(9), 0b0_1100_1111);
        assert_eq!(r.take(32), 0xf001_2345);
        assert_eq!(r.take(28), 0x0678_9abc);
        assert_eq!(r.take(32), 0);
    }

    #[test]
    fn signed_octets_are_sign_and_magnitude() {
        // WMO-No. 306 regulation 92.1.5.
        assert_eq!(sign_magnitude(&[0x80, 0x05]), Some(-5));
        assert_eq!(sign_magnitude(&[0x7f]), Some(127));
        assert_eq!(sign_magnitude(&[0x81, 0, 1]), Some(-65537));
        assert_eq!(sign_magnitude(&[]), None);
        assert_eq!(sign_magnitude_16(0x8003), -3);
        assert_eq!(unsigned(&[0x80, 0x01]), 32769);
    }

    /// Template 5.2 with missing value management 2 (code table 5.5): a
    /// constant group at the primary missing code, one at the secondary, and a
    /// group of width 3 whose values 7 and 6 are the two missing codes; then
    /// the same with management 1, where only the all-ones codes are missing.
    #[test]
    fn missing_value_management_is_the_crates() {
        for management in [1u8, 2] {
            let refs = [15u32, 3, 14, 2];
            let widths = [0u32, 3, 0, 2];
            let lens = [2u32, 5, 3, 4];
            let values: [&[u32]; 4] = [&[], &[0, 7, 6, 1, 5], &[], &[3, 0, 2, 1]];
            let mut w = Writer::default();
            for r in refs {
                w.put(r, 4);
            }
            w.pad();
            for x in widths {
                w.put(x, 2);
            }
            w.pad();
            for l in &lens[..3] {
                w.put(l - 2, 3);
            }
            w.pad();
            for (g, width) in values.iter().zip(widths) {
                for &v in g.iter() {
                    w.put(v, width);
                }
            }
            w.pad();
            let n: usize = lens.iter().sum::<u32>() as usize;
            let mut b5 = vec![0u8; 44];
            b5[..4].copy_from_slice(&(n as u32).to_be_bytes());
            b5[4..6].copy_from_slice(&2u16.to_be_bytes());
            b5[6..10].copy_from_slice(&1.5f32.to_bits().to_be_bytes());
            b5[10..12].copy_from_slice(&0x8001u16.to_be_bytes()); // E = -1
            b5[12..14].copy_from_slice(&0x0001u16.to_be_bytes()); // D = 1
            b5[14] = 4;
            b5[16] = 1;
            b5[17] = management;
            b5[26..30].copy_from_slice(&4u32.to_be_bytes());
            b5[31] = 2;
            b5[32..36].copy_from_slice(&2u32.to_be_bytes());
            b5[36] = 1;
            b5[37..41].copy_from_slice(&4u32.to_be_bytes());
            b5[41] = 3;
            let s5 = with_header(5, &b5);
            let s6 = with_header(6, &[255]);
            let s7 = with_header(7, &w.out);
            let ours = unpack(2, &s5, &s6, &s7, n)
                .expect("read directly")
                .expect("decoded");
            assert!(same(&ours, &by_crate(n, &s5, &s6, &s7)), "{ours:?}");
            let nan = ours.iter().filter(|v| v.is_nan()).count();
            assert_eq!(
                nan,
                if management == 2 {
                    2 + 2 + 3 + 2
                } else {
                    2 + 1 + 1
                }
            );
        }
    }

    /// Template 5.0 with a bitmap (section 6, indicator 0): values fill the
    /// points marked present, in order; a bitmap that disagrees with the count
    /// of section 5 is an error.
    #[test]
    fn simple_packing_with_a_bitmap_is_the_crates() {
        let mut w = Writer::default();
        for v in [5u32, 0, 1023, 77, 300] {
            w.put(v, 10);
        }
        let mut b5 = vec![0u8; 16];
        b5[..4].copy_from_slice(&5u32.to_be_bytes());
        b5[6..10].copy_from_slice(&(-2.25f32).to_bits().to_be_bytes());
        b5[10..12].copy_from_slice(&0x0002u16.to_be_bytes());
        b5[12..14].copy_from_slice(&0x8002u16.to_be_bytes());
        b5[14] = 10;
        let s5 = with_header(5, &b5);
        let s6 = with_header(6, &[0, 0b1001_0110, 0b1000_0000]);
        let s7 = with_header(7, &w.out);
        let ours = unpack(0, &s5, &s6, &s7, 9).unwrap().unwrap();
        assert!(same(&ours, &by_crate(9, &s5, &s6, &s7)), "{ours:?}");
        assert_eq!(ours.iter().filter(|v| v.is_nan()).count(), 4);
        let wrong = with_header(6, &[0, 0b1001_0110, 0b1100_0000]);
        assert!(matches!(unpack(0, &s5, &wrong, &s7, 10), Some(Err(_))));
        assert!(unpack(0, &s5, &s6, &s7[..9], 9).is_none());
    }

    /// Forms left to the crate give `None`: another template, a bitmap
    /// indicator other than 0 or 255, more than 32 bits per value.
    #[test]
    fn unknown_forms_are_left_to_the_crate() {
        let mut b5 = vec![0u8; 16];
        b5[..4].copy_from_slice(&1u32.to_be_bytes());
        b5[14] = 33;
        let s5 = with_header(5, &b5);
        let s7 = with_header(7, &[0; 8]);
        assert!(unpack(0, &s5, &with_header(6, &[255]), &s7, 1).is_none());
        assert!(unpack(40, &s5, &with_header(6, &[255]), &s7, 1).is_none());
        assert!(unpack(0, &s5, &with_header(6, &[7]), &s7, 1).is_none());
    }
}
