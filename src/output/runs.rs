//! Deflate blocks for planes of one repeated byte, written directly.
//!
//! A shuffled level's low-order byte planes are often a single value throughout:
//! zero, once bit rounding has cleared the trailing mantissa bits, also under the
//! fill value (whose two low bytes are zero); and a level with no value at all is
//! four such planes. libdeflate spends as long on such a plane as on one of
//! data (about 2.5 ns a byte at level 1, measured; docs/performance.md), yet
//! its deflate form is known in advance: the byte, then copies of 258 bytes at
//! distance 1. [`zlib_with_runs`] writes those planes' blocks itself, closes
//! them with an empty stored block so that what follows starts on a byte, and
//! lets libdeflate compress the rest as blocks of its own. The result is one
//! zlib stream (RFC 1950) that any inflater reads: the tests inflate it with
//! zlib-rs and with libdeflate, and the suite reads the files through libnetcdf.
//!
//! The block format is RFC 1951: section 3.1.1 (bit order), 3.2.5 (lengths and
//! distances), 3.2.7 (dynamic Huffman codes) and 3.2.4 (stored blocks).

/// Bits packed least significant first, as deflate writes them (RFC 1951, 3.1.1).
struct Bits {
    out: Vec<u8>,
    acc: u64,
    n: u32,
}

impl Bits {
    /// `len` (at most 32) bits of `value`, least significant first: header
    /// fields and extra bits.
    fn put(&mut self, value: u32, len: u32) {
        self.acc |= u64::from(value) << self.n;
        self.n += len;
        while self.n >= 8 {
            self.out.push(self.acc as u8);
            self.acc >>= 8;
            self.n -= 8;
        }
    }

    /// A Huffman code of `len` bits, its most significant bit first (3.1.1).
    fn code(&mut self, code: u32, len: u32) {
        self.put(code.reverse_bits() >> (32 - len), len);
    }

    /// Zero bits up to the next byte boundary.
    fn align(&mut self) {
        if self.n > 0 {
            self.put(0, 8 - self.n);
        }
    }
}

/// The code-length alphabet's order in a dynamic block's header (3.2.7).
const CL_ORDER: [usize; 19] = [
    16, 17, 18, 0, 8, 7, 9, 6, 10, 5, 11, 4, 12, 3, 13, 2, 14, 1, 15,
];

/// The code-length codes used here, (symbol, length, code): a complete
/// canonical code over 0, 17, 18 (two bits) and 1, 2 (three bits).
const CL_CODES: [(usize, u32, u32); 5] = [
    (0, 2, 0b00),
    (17, 2, 0b01),
    (18, 2, 0b10),
    (1, 3, 0b110),
    (2, 3, 0b111),
];

/// Literal/length codes of a run block: length 258 (symbol 285) one bit `0`,
/// the byte two bits `10`, end of block (256) two bits `11`; the one distance
/// code (0, distance 1) one bit `0`. Canonical for lengths 1, 2, 2 with the
/// byte's symbol below 256.
const COPY_258: (u32, u32) = (0b0, 1);
const BYTE: (u32, u32) = (0b10, 2);
const END: (u32, u32) = (0b11, 2);
const DISTANCE_1: (u32, u32) = (0b0, 1);

/// The code of code-length symbol `sym` (one of [`CL_CODES`]).
fn cl(bits: &mut Bits, sym: usize) {
    if let Some(&(_, len, code)) = CL_CODES.iter().find(|c| c.0 == sym) {
        bits.code(code, len);
    }
}

/// Write a code length sequence's `zeros` zero lengths with the run symbols 17 and 18.
fn zero_lengths(bits: &mut Bits, mut zeros: usize) {
    while zeros > 0 {
        if zeros >= 11 {
            let m = zeros.min(138);
            cl(bits, 18);
            bits.put((m - 11) as u32, 7);
            zeros -= m;
        } else if zeros >= 3 {
            cl(bits, 17);
            bits.put((zeros - 3) as u32, 3);
            zeros = 0;
        } else {
            cl(bits, 0);
            zeros -= 1;
        }
    }
}

/// The header of a dynamic-Huffman block (3.2.7) whose literal/length code has
/// `byte` (2 bits), 256 (2 bits) and 285 (1 bit), and whose distance code is 0 alone (1 bit).
fn run_block_header(bits: &mut Bits, byte: u8, last: bool) {
    bits.put(u32::from(last), 1);
    bits.put(2, 2); // BTYPE 10: dynamic Huffman codes
    bits.put(286 - 257, 5); // HLIT: codes 0 to 285
    bits.put(0, 5); // HDIST: one distance code
    let order_len = CL_ORDER
        .iter()
        .rposition(|&s| CL_CODES.iter().any(|c| c.0 == s));
    let n = order_len.map_or(4, |p| p + 1).max(4);
    bits.put((n - 4) as u32, 4); // HCLEN
    for &sym in &CL_ORDER[..n] {
        let len = CL_CODES.iter().find(|c| c.0 == sym).map_or(0, |c| c.1);
        bits.put(len, 3);
    }
    // Literal/length code lengths 0 to 285, then the one distance code length.
    let b = usize::from(byte);
    zero_lengths(bits, b);
    cl(bits, 2);
    zero_lengths(bits, 255 - b);
    cl(bits, 2); // 256, end of block
    zero_lengths(bits, 285 - 257);
    cl(bits, 1); // 285, length 258
    cl(bits, 1); // distance code 0
}

/// One block holding `len` (at least 1) copies of `byte`: the byte, copies of
/// 258 at distance 1, the remainder as the byte again, end of block.
fn run_block(bits: &mut Bits, byte: u8, len: usize, last: bool) {
    run_block_header(bits, byte, last);
    bits.code(BYTE.0, BYTE.1);
    let rest = len - 1;
    for _ in 0..rest / 258 {
        bits.code(COPY_258.0, COPY_258.1);
        bits.code(DISTANCE_1.0, DISTANCE_1.1);
    }
    for _ in 0..rest % 258 {
        bits.code(BYTE.0, BYTE.1);
    }
    bits.code(END.0, END.1);
}

/// The byte that fills all of `plane`, if one does.
fn single_byte(plane: &[u8]) -> Option<u8> {
    let &first = plane.first()?;
    // Chunks folded with OR of XOR: vectorised, no early exit inside a chunk.
    let same = plane
        .chunks(256)
        .all(|c| c.iter().fold(0u8, |a, &x| a | (x ^ first)) == 0);
    same.then_some(first)
}

/// A zlib stream (RFC 1950) of `data`, shuffled values in `planes` equal byte
/// planes: the leading planes that hold one byte each as run blocks written
/// here, the rest by `deflate_rest` (a raw deflate stream of what it is given,
/// its last block final); `None` when no leading plane holds a single byte, or
/// when `deflate_rest` fails.
pub fn zlib_with_runs(
    data: &[u8],
    planes: usize,
    deflate_rest: impl FnOnce(&[u8], &mut Vec<u8>) -> Option<()>,
) -> Option<Vec<u8>> {
    if planes == 0 || data.is_empty() || !data.len().is_multiple_of(planes) {
        return None;
    }
    let n = data.len() / planes;
    let runs: Vec<u8> = data.chunks(n).map_while(single_byte).collect();
    if runs.is_empty() {
        return None;
    }
    let mut bits = Bits {
        out: Vec::with_capacity(64 + runs.len() * (n / 1032 + 64)),
        acc: 0,
        n: 0,
    };
    // CMF 0x78 (deflate, 32 KiB window), FLG 0x01 (fastest, no dictionary, check bits).
    bits.out.extend_from_slice(&[0x78, 0x01]);
    let all = runs.len() == planes;
    for (p, &byte) in runs.iter().enumerate() {
        run_block(&mut bits, byte, n, all && p + 1 == planes);
    }
    if !all {
        // An empty stored block, not final (3.2.4): the rest starts on a byte.
        bits.put(0, 3);
        bits.align();
        bits.out.extend_from_slice(&[0x00, 0x00, 0xff, 0xff]);
    }
    bits.align();
    let mut out = bits.out;
    if !all {
        deflate_rest(&data[runs.len() * n..], &mut out)?;
    }
    out.extend_from_slice(&libdeflater::adler32(data).to_be_bytes());
    Some(out)
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::io::Read;

    /// `data` inflated by zlib-rs (through flate2) and by libdeflate.
    fn inflate_both(stream: &[u8], len: usize) -> (Vec<u8>, Vec<u8>) {
        let mut a = Vec::new();
        flate2::read::ZlibDecoder::new(stream)
            .read_to_end(&mut a)
            .expect("zlib-rs inflates the stream");
        let mut b = vec![0u8; len];
        let n = libdeflater::Decompressor::new()
            .zlib_decompress(stream, &mut b)
            .expect("libdeflate inflates the stream");
        b.truncate(n);
        (a, b)
    }

    fn rest_by_libdeflate(rest: &[u8], out: &mut Vec<u8>) -> Option<()> {
        let mut c = libdeflater::Compressor::new(libdeflater::CompressionLvl::fastest());
        let start = out.len();
        out.resize(start + c.deflate_compress_bound(rest.len()), 0);
        let n = c.deflate_compress(rest, &mut out[start..]).ok()?;
        out.truncate(start + n);
        Some(())
    }

    #[test]
    fn planes_of_one_byte_and_the_rest_inflate_to_the_data() {
        // Every count of leading single-byte planes (0 to 4), plane lengths about
        // the copy length 258 and beyond, bytes at the edges of the fixed
        // literal ranges; two independent inflaters must give the data back.
        let mut seed = 12345u32;
        let mut noise = || {
            seed = seed.wrapping_mul(1_103_515_245).wrapping_add(12_345);
            (seed >> 16) as u8
        };
        for n in [1usize, 2, 3, 257, 258, 259, 260, 517, 4_099, 100_003] {
            for lead in 0..=4usize {
                for byte in [0u8, 7, 143, 144, 255] {
                    let mut data = vec![byte; lead * n];
                    data.extend((0..(4 - lead) * n).map(|_| noise()));
                    let made = zlib_with_runs(&data, 4, rest_by_libdeflate);
                    // A first noise plane may happen to be one byte when n is 1.
                    let Some(stream) = made else {
                        assert!(lead == 0, "no stream with {lead} single-byte planes");
                        continue;
                    };
                    let (a, b) = inflate_both(&stream, data.len());
                    assert!(a == data, "zlib-rs: n {n}, {lead} planes of {byte}");
                    assert!(b == data, "libdeflate: n {n}, {lead} planes of {byte}");
                }
            }
        }
    }

    #[test]
    fn a_plane_of_one_byte_takes_about_two_bits_per_258_bytes() {
        // 1 MiB of zeros: 4,064 copies of two bits each, plus the header; libdeflate
        // makes about 1.2 kB of the same plane (measured).
        let data = vec![0u8; 4 << 20];
        let stream = zlib_with_runs(&data, 4, |_, _| None).expect("four single-byte planes");
        assert!(stream.len() < 4 * 1_100, "{} bytes", stream.len());
        let (a, b) = inflate_both(&stream, data.len());
        assert!(a == data && b == data);
        // Nothing to do for data whose first plane varies.
        let mut varied = data.clone();
        varied[5] = 1;
        assert!(zlib_with_runs(&varied, 4, |_, _| Some(())).is_none());
    }
}
