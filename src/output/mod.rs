//! Output: CF NetCDF files of the products.
//!
//! In: arrays and their grid. Out: files that appear whole or not at all.
//! Names, units and attributes of every variable come from [`variables`].

pub mod cf;
pub mod images;
pub mod pack;
pub mod page;
pub mod precision;
pub mod quicklook;
pub mod runs;
pub mod scales;
pub mod store;
pub mod variables;

/// Keep libhdf5 from printing its internal error stacks on this thread.
///
/// libnetcdf switches HDF5's automatic error printing off once, in the thread
/// that first opens a file; a thread-safe libhdf5 keeps that setting per
/// thread, so every other thread that opens a file prints the (normal, and
/// handled) failures of libnetcdf's attribute probes as "HDF5-DIAG" stacks.
/// Call this at the start of each thread that reads or writes NetCDF.
pub fn quiet_hdf5_errors() {
    // SAFETY: H5Eset_auto2 takes an error-stack id (H5E_DEFAULT, this
    // thread's default stack), an optional callback (None: no printing) and
    // a client-data pointer (null, unused when there is no callback). It
    // keeps no pointer of ours and takes libhdf5's own lock, so calling it
    // from any thread at any time is sound.
    unsafe {
        hdf5_metno_sys::h5e::H5Eset_auto2(
            hdf5_metno_sys::h5e::H5E_DEFAULT,
            None,
            std::ptr::null_mut(),
        );
    }
}

/// Cap the memory libhdf5 keeps in its own free lists, for a process that
/// runs for months: without a cap, blocks freed by every file opened and
/// written stay on those lists (about 50 KB per step was measured with
/// heaptrack on a long backlog, growing without bound). Limits in bytes:
/// 4 MiB over all lists of each kind, 256 KiB per list.
pub fn limit_hdf5_free_lists() {
    // SAFETY: H5set_free_list_limits takes six integers and keeps no pointer;
    // the thread-safe libhdf5 takes its own lock.
    unsafe {
        hdf5_metno_sys::h5::H5set_free_list_limits(
            4 << 20,
            256 << 10,
            4 << 20,
            256 << 10,
            4 << 20,
            256 << 10,
        );
    }
}

/// Give the memory on libhdf5's free lists back (after each step of a
/// long-running service).
pub fn release_hdf5_free_lists() {
    // SAFETY: H5garbage_collect takes no argument and keeps no pointer; it
    // frees only blocks on the free lists, none in use; the thread-safe
    // libhdf5 takes its own lock.
    unsafe {
        hdf5_metno_sys::h5::H5garbage_collect();
    }
    // glibc keeps freed pages in the middle of its heaps mapped; a service
    // that writes and reads thousands of files grows by tens of KB per step
    // without this (measured on a 10,000-step backlog).
    // SAFETY: malloc_trim takes a byte count to keep, touches only memory
    // that is free, and is thread-safe in glibc.
    unsafe {
        libc::malloc_trim(0);
    }
}

/// Make sure `dir` has room for `bytes` more before libnetcdf starts a file.
///
/// libnetcdf (through libhdf5) does not release a file whose writing failed
/// for lack of space: the half-written temporary stays open, deleted but
/// holding its blocks, and the disk stays full. So leeward asks for room for
/// the uncompressed size first (an upper bound: compression only shrinks it)
/// and refuses cleanly, naming the figures, when it is not there.
pub fn ensure_space(dir: &std::path::Path, bytes: u64) -> std::io::Result<()> {
    let st = rustix::fs::statvfs(dir).map_err(std::io::Error::from)?;
    let free = st.f_bavail.saturating_mul(st.f_frsize);
    if free < bytes {
        return Err(std::io::Error::new(
            std::io::ErrorKind::StorageFull,
            format!(
                "No space left on device: {:.1} MB needed (uncompressed upper bound), {:.1} MB free",
                bytes as f64 / 1e6,
                free as f64 / 1e6
            ),
        ));
    }
    Ok(())
}

/// `<pid>-<n>`: a temporary name used once, so that a retry never meets the
/// temporary of an earlier, failed attempt.
pub fn temporary_suffix() -> String {
    static N: std::sync::atomic::AtomicU64 = std::sync::atomic::AtomicU64::new(0);
    format!(
        "{}-{}",
        std::process::id(),
        N.fetch_add(1, std::sync::atomic::Ordering::Relaxed)
    )
}

/// Publish the file at `path` atomically, the one way leeward does it: `write`
/// makes the file at a hidden temporary beside it (`.<name>.<tag>-<pid>-<n>`),
/// which is then fsynced and renamed over `path`, and the directory fsynced so
/// that the rename itself survives a crash. A reader sees the old file or the
/// new one, never a part; on any error the temporary is removed. `io_err`
/// names the path a system call failed on.
pub fn publish_atomically<E>(
    path: &std::path::Path,
    tag: &str,
    write: impl FnOnce(&std::path::Path) -> Result<(), E>,
    io_err: impl Fn(&std::path::Path, std::io::Error) -> E,
) -> Result<(), E> {
    use std::fs::File;
    let dir = path
        .parent()
        .filter(|d| !d.as_os_str().is_empty())
        .unwrap_or(std::path::Path::new("."));
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dir.join(format!(".{name}.{tag}-{}", temporary_suffix()));
    let r = write(&tmp).and_then(|()| {
        File::open(&tmp)
            .and_then(|f| f.sync_all())
            .map_err(|e| io_err(&tmp, e))?;
        std::fs::rename(&tmp, path).map_err(|e| io_err(path, e))?;
        File::open(dir)
            .and_then(|d| d.sync_all())
            .map_err(|e| io_err(dir, e))
    });
    if r.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    r
}

/// Write `bytes` to `path` atomically ([`publish_atomically`]).
pub fn write_file_atomic(path: &std::path::Path, bytes: &[u8]) -> std::io::Result<()> {
    publish_atomically(path, "partial", |tmp| std::fs::write(tmp, bytes), |_, e| e)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn entries(dir: &std::path::Path) -> Vec<String> {
        let mut v: Vec<String> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        v.sort();
        v
    }

    #[test]
    fn a_failed_publication_leaves_the_old_file_and_no_temporary() {
        // The promise of every published file (leeward's own rule): a reader
        // sees the old file or the new one, and nothing is left behind.
        let d = std::env::temp_dir().join(format!("leeward-atomic-{}", std::process::id()));
        let _ = std::fs::remove_dir_all(&d);
        std::fs::create_dir_all(&d).unwrap();
        let path = d.join("a.nc");
        write_file_atomic(&path, b"old").unwrap();
        let failed = publish_atomically(
            &path,
            "partial",
            |tmp| {
                std::fs::write(tmp, b"half")?;
                Err(std::io::Error::other("the writer failed"))
            },
            |_, e| e,
        );
        assert!(failed.is_err());
        assert_eq!(std::fs::read(&path).unwrap(), b"old");
        assert_eq!(entries(&d), vec!["a.nc".to_string()]);
        write_file_atomic(&path, b"new").unwrap();
        assert_eq!(std::fs::read(&path).unwrap(), b"new");
        assert_eq!(entries(&d), vec!["a.nc".to_string()]);
        let _ = std::fs::remove_dir_all(&d);
    }
}
