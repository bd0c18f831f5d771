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

/// Write `bytes` to `path` atomically: a hidden temporary beside it, fsync,
/// rename, fsync of the directory. A reader sees the old file or the new one.
pub fn write_file_atomic(path: &std::path::Path, bytes: &[u8]) -> std::io::Result<()> {
    use std::io::Write;
    let dir = path.parent().unwrap_or(std::path::Path::new("."));
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dir.join(format!(".{name}.partial-{}", temporary_suffix()));
    let r = (|| {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)?;
        std::fs::File::open(dir)?.sync_all()
    })();
    if r.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    r
}
