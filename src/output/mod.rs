//! Output: CF NetCDF files of the products.
//!
//! In: arrays and their grid. Out: files that appear whole or not at all.
//! Names, units and attributes of every variable come from [`variables`].

pub mod cf;
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
