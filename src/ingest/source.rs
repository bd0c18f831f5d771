//! Input files as the file system has them: opened without blocking, refused
//! unless they are regular files, and read where asked, never whole.
//!
//! In: a path. Out: an open regular file with its size and mtime, or an
//! [`InputError`] naming what the path is (a FIFO, a directory, a device, a
//! socket) or why it could not be opened; byte ranges of an open file; the
//! [`Octets`] view the catalogue walks, over memory or over a file, so that a
//! file is catalogued section by section and its data sections are never
//! read until a step decodes them.
//!
//! Why not map the file: a file truncated underneath a mapping turns every
//! later read of the lost pages into SIGBUS, which no error path can catch.
//! Positioned reads (`pread`) of the few octets the catalogue looks at cost
//! little and fail with an error instead.

use std::borrow::Cow;
use std::fs::{File, Metadata};
use std::ops::Range;
use std::os::unix::fs::{FileExt, FileTypeExt, OpenOptionsExt};
use std::path::Path;

use thiserror::Error;

/// Why an input could not be opened.
#[derive(Debug, Error)]
pub enum InputError {
    /// The path is there but is not a regular file.
    #[error("{0}, not a regular file")]
    NotRegular(&'static str),
    /// The system refused (missing, permission, I/O).
    #[error("cannot open: {0}")]
    Io(#[from] std::io::Error),
}

/// What kind of file system object a file type is, in words.
pub fn kind_of(t: &std::fs::FileType) -> &'static str {
    if t.is_dir() {
        "a directory"
    } else if t.is_fifo() {
        "a FIFO (named pipe)"
    } else if t.is_socket() {
        "a socket"
    } else if t.is_char_device() {
        "a character device"
    } else if t.is_block_device() {
        "a block device"
    } else if t.is_symlink() {
        "a symbolic link"
    } else if t.is_file() {
        "a regular file"
    } else {
        "an unknown kind of file"
    }
}

/// An input file, open for reading.
pub struct Opened {
    /// The open file.
    pub file: File,
    /// Its size when opened (reads stop there, whatever is appended later).
    pub size: u64,
    /// Its modification time when opened, nanoseconds since the Unix epoch.
    pub mtime_ns: i64,
}

fn mtime_ns(m: &Metadata) -> i64 {
    m.modified()
        .ok()
        .and_then(|t| t.duration_since(std::time::UNIX_EPOCH).ok())
        .map(|d| d.as_nanos() as i64)
        .unwrap_or(0)
}

/// Open an input file without ever blocking and only if it is a regular file.
///
/// The path is looked at first (`stat`, or `lstat` when `follow` is false),
/// so a device or FIFO is refused without being opened at all; then it is
/// opened with `O_NONBLOCK` (a FIFO swapped in meanwhile opens at once
/// instead of waiting for a writer) and `O_NOCTTY`, and the open descriptor
/// is checked again (`fstat`), which no rename can change any more. With
/// `follow` false a symbolic link is refused (`O_NOFOLLOW`).
pub fn open_input(path: &Path, follow: bool) -> Result<Opened, InputError> {
    let before = if follow {
        std::fs::metadata(path)?
    } else {
        std::fs::symlink_metadata(path)?
    };
    if !before.file_type().is_file() {
        return Err(InputError::NotRegular(kind_of(&before.file_type())));
    }
    let mut flags = libc::O_NONBLOCK | libc::O_NOCTTY | libc::O_CLOEXEC;
    if !follow {
        flags |= libc::O_NOFOLLOW;
    }
    let file = std::fs::OpenOptions::new()
        .read(true)
        .custom_flags(flags)
        .open(path)?;
    let m = file.metadata()?;
    if !m.file_type().is_file() {
        return Err(InputError::NotRegular(kind_of(&m.file_type())));
    }
    Ok(Opened {
        size: m.len(),
        mtime_ns: mtime_ns(&m),
        file,
    })
}

/// Read the byte ranges `(offset, length)` of an open file into one buffer,
/// one after the other; checks first that the file still has `expect_size`
/// octets (it changed since it was catalogued otherwise).
pub fn read_ranges(
    file: &File,
    expect_size: u64,
    ranges: &[(u64, u64)],
) -> std::io::Result<Vec<u8>> {
    let size = file.metadata()?.len();
    if size != expect_size {
        return Err(std::io::Error::other(format!(
            "changed since it was catalogued ({expect_size} bytes then, {size} now)"
        )));
    }
    let total: u64 = ranges.iter().map(|r| r.1).sum();
    if ranges.iter().any(|&(o, n)| o.saturating_add(n) > size) {
        return Err(std::io::Error::other(
            "a message lies beyond the end of the file",
        ));
    }
    let mut out = vec![0u8; usize::try_from(total).map_err(std::io::Error::other)?];
    let mut at = 0usize;
    for &(off, len) in ranges {
        let n = len as usize;
        file.read_exact_at(&mut out[at..at + n], off)?;
        at += n;
    }
    Ok(out)
}

/// FNV-1a 64 of a whole open file (its first `size` octets), read in pieces.
pub fn checksum_file(file: &File, size: u64) -> std::io::Result<String> {
    checksum_ranges(file, &[(0, size)])
}

/// FNV-1a 64 of the byte ranges `(offset, length)` of an open file, one after
/// the other, read in pieces of 1 MB: the same as the checksum of the ranges
/// joined, without holding them.
pub fn checksum_ranges(file: &File, ranges: &[(u64, u64)]) -> std::io::Result<String> {
    let mut h = super::bytes::Fnv1a::new();
    let mut buf = vec![0u8; (1 << 20).min(ranges.iter().map(|r| r.1).max().unwrap_or(0) as usize)];
    for &(start, len) in ranges {
        let end = start.saturating_add(len);
        let mut off = start;
        while off < end {
            let want = (end - off).min(buf.len() as u64) as usize;
            let n = file.read_at(&mut buf[..want], off)?;
            if n == 0 {
                return Err(std::io::Error::new(
                    std::io::ErrorKind::UnexpectedEof,
                    format!("the file ends at {off} bytes, {end} were there when it was opened"),
                ));
            }
            h.update(&buf[..n]);
            off += n as u64;
        }
    }
    Ok(h.hex())
}

/// Octets the catalogue can walk: a file in memory, or a file on disk read
/// where the walk looks.
pub trait Octets {
    /// How many octets there are.
    fn len(&self) -> usize;
    /// True when there are none.
    fn is_empty(&self) -> bool {
        self.len() == 0
    }
    /// The octets of `r`, clipped to the end; an error when they cannot be read.
    fn read(&self, r: Range<usize>) -> Result<Cow<'_, [u8]>, String>;
    /// Offset of the first `GRIB` marker at or after `from`.
    fn find_marker(&self, from: usize) -> Option<usize>;
}

impl Octets for [u8] {
    fn len(&self) -> usize {
        <[u8]>::len(self)
    }
    fn read(&self, r: Range<usize>) -> Result<Cow<'_, [u8]>, String> {
        let end = r.end.min(<[u8]>::len(self));
        Ok(Cow::Borrowed(
            self.get(r.start.min(end)..end).unwrap_or(&[]),
        ))
    }
    fn find_marker(&self, from: usize) -> Option<usize> {
        let hay = self.get(from..)?;
        hay.windows(4).position(|w| w == b"GRIB").map(|i| i + from)
    }
}

/// An open file seen as octets: its first `len` octets, read on demand.
pub struct FileOctets<'a> {
    file: &'a File,
    len: usize,
}

impl<'a> FileOctets<'a> {
    /// The first `size` octets of `file` (its size when opened).
    pub fn new(file: &'a File, size: u64) -> Self {
        FileOctets {
            file,
            len: usize::try_from(size).unwrap_or(usize::MAX),
        }
    }
}

/// How much the marker search reads at a time.
const SCAN_CHUNK: usize = 1 << 16;

impl Octets for FileOctets<'_> {
    fn len(&self) -> usize {
        self.len
    }
    fn read(&self, r: Range<usize>) -> Result<Cow<'_, [u8]>, String> {
        let end = r.end.min(self.len);
        let start = r.start.min(end);
        let mut buf = vec![0u8; end - start];
        let mut got = 0;
        while got < buf.len() {
            match self.file.read_at(&mut buf[got..], (start + got) as u64) {
                Ok(0) => {
                    return Err(format!(
                        "the file ends at byte {}, before the {} bytes it had when opened",
                        start + got,
                        self.len
                    ))
                }
                Ok(n) => got += n,
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
                Err(e) => return Err(format!("cannot read at byte {}: {e}", start + got)),
            }
        }
        Ok(Cow::Owned(buf))
    }
    fn find_marker(&self, from: usize) -> Option<usize> {
        let mut at = from;
        while at < self.len {
            // Chunks overlap by 3 octets so that a marker across a boundary is found.
            let chunk = self.read(at..at.saturating_add(SCAN_CHUNK)).ok()?;
            if let Some(i) = chunk.windows(4).position(|w| w == b"GRIB") {
                return Some(at + i);
            }
            if at + chunk.len() >= self.len || chunk.len() < 4 {
                return None;
            }
            at += chunk.len() - 3;
        }
        None
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn checksum_of_ranges_is_that_of_the_ranges_joined() {
        let dir = Scratch::new("checksum");
        let p = dir.join("ranges");
        let data: Vec<u8> = (0..3_000_000u32).map(|i| (i * 7 % 251) as u8).collect();
        std::fs::write(&p, &data).unwrap();
        let f = File::open(&p).unwrap();
        let ranges = [(5u64, 1_500_000u64), (2_000_000, 10), (1, 3)];
        let mut joined = Vec::new();
        for &(o, n) in &ranges {
            joined.extend_from_slice(&data[o as usize..(o + n) as usize]);
        }
        assert_eq!(
            checksum_ranges(&f, &ranges).unwrap(),
            super::super::bytes::fnv1a_hex(&joined)
        );
        assert_eq!(
            checksum_file(&f, data.len() as u64).unwrap(),
            super::super::bytes::fnv1a_hex(&data)
        );
        assert!(
            checksum_ranges(&f, &[(2_999_990, 20)]).is_err(),
            "past the end"
        );
    }

    /// A folder of one test's own, removed when the test ends, failed or not.
    struct Scratch(std::path::PathBuf);

    impl Scratch {
        fn new(test: &str) -> Self {
            let d =
                std::env::temp_dir().join(format!("leeward-source-{test}-{}", std::process::id()));
            std::fs::create_dir_all(&d).unwrap();
            Scratch(d)
        }

        fn join(&self, name: &str) -> std::path::PathBuf {
            self.0.join(name)
        }
    }

    impl Drop for Scratch {
        fn drop(&mut self) {
            let _ = std::fs::remove_dir_all(&self.0);
        }
    }

    #[test]
    fn fifos_and_directories_are_refused_at_once_by_kind() {
        let dir = Scratch::new("fifos");
        let fifo = dir.join("pipe.grib2");
        let c = std::ffi::CString::new(fifo.as_os_str().as_encoded_bytes()).unwrap();
        // SAFETY: mkfifo(3) reads the NUL-terminated path for the duration of the call.
        assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o600) }, 0);
        // Opening a FIFO for reading with no writer would wait for ever.
        let t = std::time::Instant::now();
        let e = open_input(&fifo, true).err().unwrap().to_string();
        assert_eq!(e, "a FIFO (named pipe), not a regular file");
        assert!(t.elapsed() < std::time::Duration::from_secs(10));
        let e = open_input(&std::env::temp_dir(), true).err().unwrap();
        assert_eq!(e.to_string(), "a directory, not a regular file");
        let e = open_input(Path::new("/dev/null"), true).err().unwrap();
        assert_eq!(e.to_string(), "a character device, not a regular file");
    }

    #[test]
    fn links_are_refused_when_not_followed() {
        let dir = Scratch::new("links");
        let target = dir.join("target.grib2");
        std::fs::write(&target, b"GRIB").unwrap();
        let link = dir.join("link.grib2");
        std::os::unix::fs::symlink(&target, &link).unwrap();
        assert_eq!(open_input(&link, true).unwrap().size, 4);
        let e = open_input(&link, false).err().unwrap().to_string();
        assert_eq!(e, "a symbolic link, not a regular file");
    }

    #[test]
    fn file_octets_read_and_find_like_memory() {
        let dir = Scratch::new("octets");
        // A marker across the boundary between two scan chunks.
        let mut data = vec![0u8; SCAN_CHUNK + 100];
        data[SCAN_CHUNK - 2..SCAN_CHUNK + 2].copy_from_slice(b"GRIB");
        let p = dir.join("octets.bin");
        std::fs::write(&p, &data).unwrap();
        let o = open_input(&p, true).unwrap();
        let f = FileOctets::new(&o.file, o.size);
        assert_eq!(f.find_marker(0), data.as_slice().find_marker(0));
        assert_eq!(f.find_marker(0), Some(SCAN_CHUNK - 2));
        assert_eq!(f.find_marker(SCAN_CHUNK), None);
        assert_eq!(
            f.read(10..SCAN_CHUNK + 1000).unwrap().len(),
            data.len() - 10
        );
        assert_eq!(
            checksum_file(&o.file, o.size).unwrap(),
            super::super::bytes::fnv1a_hex(&data)
        );
    }
}
