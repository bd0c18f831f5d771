"""Shared fixtures for leeward's Python reference tests.

- where the repository and the leeward binary are (``LEEWARD_BIN``, default
  ``target/release/leeward`` under the repository root);
- the real GRIB2 samples folder (``LEEWARD_SAMPLES``, default ``../shared/data/grib2`` beside
  the checkout, or ``/work/shared/data/grib2``), with a visible skip where it is absent;
- the closed-form inputs, encoded once per session with ecCodes (gribgen.py);
- leeward runs, one per input, each into its own output folder, cached for the session so
  that every test module reads the same products.

pyproj is imported before anything can load ecCodes: two PROJ libraries in one process
clash otherwise (practical notes in the project's references).
"""

from __future__ import annotations

import dataclasses
import os
import subprocess
import sys
import time
from pathlib import Path

import pyproj  # noqa: F401  (must be the first to load PROJ)
import pytest

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

import gribgen  # noqa: E402

REPO_ROOT = HERE.parents[1]
RUN_TIMEOUT_S = 180

#: Real samples used by these tests (file names in the shared samples folder).
GFS_SAMPLE = "gfs-2p5deg-2011100800-f072.grib2"
ETA_SAMPLE = "eta-lambert-2004120812-f024.grib2"
REAL_SAMPLES = {"gfs_2p5": GFS_SAMPLE, "eta_lambert": ETA_SAMPLE}


def leeward_bin_path() -> Path:
    return Path(os.environ.get("LEEWARD_BIN", REPO_ROOT / "target" / "release" / "leeward"))


def samples_path() -> Path:
    env = os.environ.get("LEEWARD_SAMPLES")
    if env:
        return Path(env)
    beside = REPO_ROOT.parent / "shared" / "data" / "grib2"
    if beside.is_dir():
        return beside
    return Path("/work/shared/data/grib2")


@dataclasses.dataclass
class Run:
    """One `leeward process` run: its command, exit status, output and the files written."""

    name: str
    inputs: list
    out_dir: Path
    returncode: int
    stdout: str
    stderr: str
    seconds: float

    @property
    def nc_files(self) -> list[Path]:
        # The step files; a cycle's cyclone tracks (`*_cyclones*.nc`) are not steps.
        return sorted(p for p in self.out_dir.glob("*.nc") if "_cyclones" not in p.name)

    def describe(self) -> str:
        tail = "\n".join(self.stderr.strip().splitlines()[-15:])
        return (f"leeward process on {[str(p) for p in self.inputs]} -> exit {self.returncode} "
                f"in {self.seconds:.1f} s; files {[p.name for p in self.nc_files]}\nstderr tail:\n{tail}")


def run_leeward(binary: Path, inputs, out_dir: Path, name: str = "", timeout: float = RUN_TIMEOUT_S,
                config: Path | None = None) -> Run:
    """Run ``leeward process [--config FILE] --out DIR INPUT...`` as a subprocess with a timeout."""
    out_dir.mkdir(parents=True, exist_ok=True)
    opts = ["--config", str(config)] if config is not None else []
    cmd = [str(binary), "process", *opts, "--out", str(out_dir), *[str(p) for p in inputs]]
    t0 = time.monotonic()
    try:
        cp = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout, cwd=REPO_ROOT)
        rc, so, se = cp.returncode, cp.stdout, cp.stderr
    except subprocess.TimeoutExpired as e:
        rc, so, se = -9, e.stdout or "", f"timed out after {timeout} s\n{e.stderr or ''}"
        if isinstance(so, bytes):
            so = so.decode(errors="replace")
        if isinstance(se, bytes):
            se = se.decode(errors="replace")
    return Run(name, list(inputs), out_dir, rc, so, se, time.monotonic() - t0)


@pytest.fixture(autouse=True)
def _no_service_outlives_its_test():
    """A test that fails half-way must not leave its service running: the
    services started through test_service.Service (used by several test
    modules) are killed when each test ends."""
    yield
    mod = sys.modules.get("test_service")
    started = getattr(mod, "_STARTED", None) if mod else None
    while started:
        p = started.pop()
        if p.poll() is None:
            p.kill()
            p.wait(timeout=30)


@pytest.fixture(scope="session")
def leeward_bin() -> Path:
    b = leeward_bin_path()
    if not (b.is_file() and os.access(b, os.X_OK)):
        msg = (f"leeward binary not found at {b}: build it with `cargo build --release` "
               "or set LEEWARD_BIN")
        if os.environ.get("CI"):
            pytest.fail(msg)  # in CI a missing binary is an error, never a quiet skip
        pytest.skip(msg)
    return b


@pytest.fixture(scope="session")
def samples_dir() -> Path:
    d = samples_path()
    if not d.is_dir():
        pytest.skip(f"real GRIB2 samples folder absent ({d}); set LEEWARD_SAMPLES to run these checks")
    return d


@pytest.fixture(scope="session")
def closed_form_inputs(tmp_path_factory) -> dict[str, Path]:
    """Every closed-form case of gribgen, encoded once into a session folder."""
    return gribgen.build_all(tmp_path_factory.mktemp("closed_form_inputs"))


class RunCache:
    """Runs leeward at most once per named input during the session."""

    def __init__(self, binary, root: Path, resolve_input):
        self.binary = binary
        self.root = root
        self.resolve_input = resolve_input
        self.runs: dict[str, Run] = {}

    def get(self, name: str) -> Run:
        if name not in self.runs:
            inp = self.resolve_input(name)
            self.runs[name] = run_leeward(self.binary, [inp], self.root / name, name)
        return self.runs[name]


@pytest.fixture(scope="session")
def closed_form_runs(leeward_bin, closed_form_inputs, tmp_path_factory) -> RunCache:
    return RunCache(leeward_bin, tmp_path_factory.mktemp("closed_form_out"),
                    lambda n: closed_form_inputs[n])


@pytest.fixture(scope="session")
def real_runs(leeward_bin, samples_dir, tmp_path_factory) -> RunCache:
    def resolve(name):
        p = samples_dir / REAL_SAMPLES[name]
        if not p.is_file():
            pytest.skip(f"sample {p.name} absent from {samples_dir}")
        return p

    return RunCache(leeward_bin, tmp_path_factory.mktemp("real_out"), resolve)


def single_product(run: Run) -> Path:
    """The one NetCDF file a single-step, single-grid input must give (asserting it)."""
    files = run.nc_files
    assert len(files) == 1, f"expected exactly one .nc file\n{run.describe()}"
    return files[0]


#: Figures and notes the checks want a reader to see (agreement with real model fields,
#: compliance-checker remarks); printed in the terminal summary whatever the outcome.
FIGURES: list[str] = []


def pytest_terminal_summary(terminalreporter):
    if FIGURES:
        terminalreporter.section("leeward reference figures")
        for line in FIGURES:
            terminalreporter.write_line(line)
