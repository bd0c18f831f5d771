#!/usr/bin/env bash
# Prepares the Python environment of the reference test suite (ecCodes, netCDF4,
# xarray, pyproj, the CF compliance checker) in a virtual environment kept in
# ~/.cache/leeward/venv, reinstalled only when tests/python/requirements.txt changes.
# Prints the path of the environment's python.
set -euo pipefail
here="$(cd "$(dirname "$0")" && pwd)"
venv="${LEEWARD_VENV:-${XDG_CACHE_HOME:-$HOME/.cache}/leeward/venv}"
req="$here/python/requirements.txt"
if ! python3 -c 'import venv, ensurepip' >/dev/null 2>&1; then
  if [ "$(id -u)" = 0 ]; then
    DEBIAN_FRONTEND=noninteractive apt-get update -qq
    DEBIAN_FRONTEND=noninteractive apt-get install -y -qq python3-venv >/dev/null
  else
    echo "leeward: Python venv support is missing. Install it with:" >&2
    echo "  sudo apt-get update && sudo apt-get install -y python3-venv" >&2
    exit 1
  fi
fi
stamp="$venv/.requirements.sha256"
want="$(sha256sum "$req" | cut -d' ' -f1)"
if [ ! -x "$venv/bin/python" ] || [ "$(cat "$stamp" 2>/dev/null)" != "$want" ]; then
  echo "leeward: preparing the Python test environment in $venv" >&2
  python3 -m venv "$venv"
  "$venv/bin/python" -m pip install -q --upgrade pip >&2
  "$venv/bin/python" -m pip install -q -r "$req" >&2
  echo "$want" > "$stamp"
fi
echo "$venv/bin/python"
