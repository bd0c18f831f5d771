//! Bounds-checked big-endian readers for GRIB2 octets.
//!
//! In: a byte slice and a 0-based offset. Out: the number, or `None` when the
//! slice is too short. Never panics, whatever the slice.
//!
//! GRIB2 signed integers use sign and magnitude (the top bit is the sign), not
//! two's complement (WMO-No. 306, Manual on Codes, FM 92 GRIB, regulation 92.1.5).

/// Unsigned 1-octet value at `at`.
pub fn u8_at(b: &[u8], at: usize) -> Option<u8> {
    b.get(at).copied()
}

/// Unsigned 2-octet value at `at`.
pub fn u16_at(b: &[u8], at: usize) -> Option<u16> {
    let s = b.get(at..at.checked_add(2)?)?;
    Some(u16::from_be_bytes([s[0], s[1]]))
}

/// Unsigned 4-octet value at `at`.
pub fn u32_at(b: &[u8], at: usize) -> Option<u32> {
    let s = b.get(at..at.checked_add(4)?)?;
    Some(u32::from_be_bytes([s[0], s[1], s[2], s[3]]))
}

/// Unsigned 8-octet value at `at`.
pub fn u64_at(b: &[u8], at: usize) -> Option<u64> {
    let s = b.get(at..at.checked_add(8)?)?;
    let mut a = [0u8; 8];
    a.copy_from_slice(s);
    Some(u64::from_be_bytes(a))
}

/// Signed (sign and magnitude) 1-octet value at `at`.
pub fn i8_at(b: &[u8], at: usize) -> Option<i32> {
    let v = u8_at(b, at)?;
    let mag = i32::from(v & 0x7f);
    Some(if v & 0x80 != 0 { -mag } else { mag })
}

/// Signed (sign and magnitude) 4-octet value at `at`.
pub fn i32_at(b: &[u8], at: usize) -> Option<i64> {
    let v = u32_at(b, at)?;
    let mag = i64::from(v & 0x7fff_ffff);
    Some(if v & 0x8000_0000 != 0 { -mag } else { mag })
}

/// IEEE 754 single precision at `at`.
pub fn f32_at(b: &[u8], at: usize) -> Option<f32> {
    u32_at(b, at).map(f32::from_bits)
}

/// True when every bit of the `n` octets at `at` is set: GRIB2's "missing".
pub fn all_ones(b: &[u8], at: usize, n: usize) -> bool {
    match b.get(at..at.saturating_add(n)) {
        Some(s) if s.len() == n => s.iter().all(|&x| x == 0xff),
        _ => false,
    }
}

/// FNV-1a 64-bit hash of a byte string, as 16 hex digits: a stable fingerprint
/// (Fowler, Noll and Vo; from memory), not a security hash.
pub fn fnv1a_hex(bytes: &[u8]) -> String {
    let mut h = Fnv1a::new();
    h.update(bytes);
    h.hex()
}

/// [`fnv1a_hex`] of the concatenation of `parts`, without copying them.
pub fn fnv1a_hex_parts(parts: &[&[u8]]) -> String {
    let mut h = Fnv1a::new();
    for part in parts {
        h.update(part);
    }
    h.hex()
}

/// FNV-1a 64 fed in pieces: the same result as [`fnv1a_hex`] of the pieces joined.
#[derive(Debug, Clone, Copy)]
pub struct Fnv1a(u64);

impl Default for Fnv1a {
    fn default() -> Self {
        Self::new()
    }
}

impl Fnv1a {
    /// The offset basis.
    pub fn new() -> Self {
        Fnv1a(0xcbf2_9ce4_8422_2325)
    }
    /// Take more octets.
    pub fn update(&mut self, bytes: &[u8]) {
        let mut h = self.0;
        for &b in bytes {
            h ^= u64::from(b);
            h = h.wrapping_mul(0x0100_0000_01b3);
        }
        self.0 = h;
    }
    /// The hash so far, 16 hex digits.
    pub fn hex(&self) -> String {
        format!("{:016x}", self.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sign_and_magnitude_not_twos_complement() {
        // WMO-No. 306 regulation 92.1.5: negative values set the top bit.
        assert_eq!(i32_at(&[0x80, 0, 0, 5], 0), Some(-5));
        assert_eq!(i32_at(&[0x00, 0, 0, 5], 0), Some(5));
        assert_eq!(i8_at(&[0x81], 0), Some(-1));
    }

    #[test]
    fn short_slices_give_none() {
        assert_eq!(u32_at(&[1, 2, 3], 0), None);
        assert_eq!(u16_at(&[1, 2], 1), None);
        assert_eq!(u64_at(&[0; 8], usize::MAX), None);
        assert!(!all_ones(&[0xff], 0, 2));
    }
}
