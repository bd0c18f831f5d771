#!/usr/bin/env bash
# Makes sure the system libraries leeward builds against are present (Debian 12).
# Installs them with apt-get when run as root; otherwise stops with the exact command.
set -euo pipefail

need=()
command -v cargo >/dev/null 2>&1 || {
  echo "leeward: the Rust toolchain is missing. Install it with:" >&2
  echo "  curl --proto '=https' --tlsv1.2 -sSf https://sh.rustup.rs | sh" >&2
  exit 1
}
command -v pkg-config >/dev/null 2>&1 || need+=(pkg-config)
[ -e /usr/include/netcdf.h ] || need+=(libnetcdf-dev)
command -v cc >/dev/null 2>&1 || need+=(build-essential)
# ncdump: the README's first look at a product's header (the docs test runs it).
command -v ncdump >/dev/null 2>&1 || need+=(netcdf-bin)
# The reader clients of tests/python/test_readers.py: GDAL with its Python bindings (run
# with the system Python they are built for) and UDUNITS (its library for the NCAS CF
# checker, its udunits2 program for the unit checks).
/usr/bin/python3 -c 'from osgeo import gdal' >/dev/null 2>&1 || need+=(gdal-bin python3-gdal)
command -v udunits2 >/dev/null 2>&1 || need+=(udunits-bin libudunits2-0)
# Chromium and its driver: the cycle page's test loads the page in a real headless browser.
[ -x /usr/bin/chromium ] || need+=(chromium)
[ -x /usr/bin/chromedriver ] || need+=(chromium-driver)

if [ ${#need[@]} -gt 0 ]; then
  if [ "$(id -u)" = 0 ]; then
    echo "leeward: installing ${need[*]} with apt-get" >&2
    # apt-get update first: without it Debian 12 reports unmet libcurl dependencies.
    DEBIAN_FRONTEND=noninteractive apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq "${need[@]}" >/dev/null
  else
    echo "leeward: missing system packages. Install them with:" >&2
    echo "  sudo apt-get update && sudo apt-get install -y ${need[*]}" >&2
    exit 1
  fi
fi
