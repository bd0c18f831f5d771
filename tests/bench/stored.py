#!/usr/bin/env python3
"""Bytes each variable of a leeward file takes on disk, as HDF5 stored them (after bit
rounding, shuffle and deflate), read from the file itself.

    python3 tests/bench/stored.py FILE.nc [FILE.nc ...] [--json]

The sizes come from the HDF5 library the system's libnetcdf uses (H5Dget_storage_size,
called through ctypes): the allocated bytes of each dataset's chunks, so the figures are the
real ones of leeward's writer (libdeflate), not a stand-in. Coordinates and other small
datasets are listed too; the file's size is the sum plus HDF5's own metadata.
"""

from __future__ import annotations

import argparse
import ctypes
import ctypes.util
import json
import sys

hid_t = ctypes.c_int64
hsize_t = ctypes.c_uint64
H5P_DEFAULT = 0
H5F_ACC_RDONLY = 0
H5E_DEFAULT = 0
H5_INDEX_NAME = 0
H5_ITER_INC = 0


class GroupInfo(ctypes.Structure):
    """H5G_info_t."""

    _fields_ = [("storage_type", ctypes.c_int), ("nlinks", hsize_t), ("max_corder", ctypes.c_int64),
                ("mounted", ctypes.c_bool)]


def library() -> ctypes.CDLL:
    """The system's HDF5 C library (Debian's serial build, as libnetcdf links it)."""
    for name in ("hdf5_serial", "hdf5"):
        path = ctypes.util.find_library(name)
        if path:
            lib = ctypes.CDLL(path)
            break
    else:
        raise SystemExit("the HDF5 C library (libhdf5) is not installed")
    lib.H5open()
    lib.H5Fopen.restype = hid_t
    lib.H5Fopen.argtypes = [ctypes.c_char_p, ctypes.c_uint, hid_t]
    lib.H5Gopen2.restype = hid_t
    lib.H5Gopen2.argtypes = [hid_t, ctypes.c_char_p, hid_t]
    lib.H5Gget_info.argtypes = [hid_t, ctypes.POINTER(GroupInfo)]
    lib.H5Lget_name_by_idx.restype = ctypes.c_ssize_t
    lib.H5Lget_name_by_idx.argtypes = [hid_t, ctypes.c_char_p, ctypes.c_int, ctypes.c_int, hsize_t,
                                       ctypes.c_char_p, ctypes.c_size_t, hid_t]
    lib.H5Dopen2.restype = hid_t
    lib.H5Dopen2.argtypes = [hid_t, ctypes.c_char_p, hid_t]
    lib.H5Dget_storage_size.restype = hsize_t
    lib.H5Dget_storage_size.argtypes = [hid_t]
    for f in ("H5Dclose", "H5Gclose", "H5Fclose"):
        getattr(lib, f).argtypes = [hid_t]
    lib.H5Eset_auto2.argtypes = [hid_t, ctypes.c_void_p, ctypes.c_void_p]
    lib.H5Eset_auto2(H5E_DEFAULT, None, None)
    return lib


def stored_bytes(path: str, lib: ctypes.CDLL | None = None) -> dict[str, int]:
    """Variable name -> bytes stored, for every dataset in the root group of `path`."""
    lib = lib or library()
    f = lib.H5Fopen(path.encode(), H5F_ACC_RDONLY, H5P_DEFAULT)
    if f < 0:
        raise SystemExit(f"{path}: HDF5 cannot open it")
    g = lib.H5Gopen2(f, b"/", H5P_DEFAULT)
    info = GroupInfo()
    lib.H5Gget_info(g, ctypes.byref(info))
    sizes = {}
    buf = ctypes.create_string_buffer(1024)
    for i in range(info.nlinks):
        n = lib.H5Lget_name_by_idx(g, b".", H5_INDEX_NAME, H5_ITER_INC, i, buf, len(buf), H5P_DEFAULT)
        if n < 0:
            continue
        name = buf.value
        d = lib.H5Dopen2(g, name, H5P_DEFAULT)
        if d < 0:
            continue
        sizes[name.decode()] = int(lib.H5Dget_storage_size(d))
        lib.H5Dclose(d)
    lib.H5Gclose(g)
    lib.H5Fclose(f)
    return sizes


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("files", nargs="+")
    ap.add_argument("--json", action="store_true")
    a = ap.parse_args(argv)
    lib = library()
    for path in a.files:
        sizes = stored_bytes(path, lib)
        if a.json:
            print(json.dumps({"file": path, "stored": sizes}))
        else:
            for name, b in sorted(sizes.items(), key=lambda kv: -kv[1]):
                print(f"{path}\t{name}\t{b}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
