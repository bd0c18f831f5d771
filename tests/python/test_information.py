"""The bitwise real information content that sets each product's kept bits
(tests/bench/information.py; Kloewer et al. 2021, Nature Computational Science 1, 713-724),
checked against closed forms, and the kept bits of leeward's files checked against the table
of docs/output.md.
"""

from __future__ import annotations

import math
import re
import sys

import netCDF4
import numpy as np
import pytest

from conftest import REAL_SAMPLES, REPO_ROOT

sys.path.insert(0, str(REPO_ROOT / "tests" / "bench"))
import information  # noqa: E402


def _h2(q: float) -> float:
    return -sum(p * math.log2(p) for p in (q, 1.0 - q) if p > 0.0)


@pytest.mark.parametrize("q", [0.0, 0.05, 0.2, 0.5])
def test_mutual_information_of_a_binary_symmetric_channel(q):
    # Closed form (Shannon; Cover and Thomas, "Elements of Information Theory", from memory):
    # a fair bit seen through a channel that flips it with probability q carries 1 - H(q).
    n = 1_000_000
    ones = n // 2
    both = round(ones * (1.0 - q))
    mi = information.mutual_information(np.array([ones]), np.array([ones]), np.array([both]), n)
    assert mi[0] == pytest.approx(1.0 - _h2(q), abs=1e-9)


def test_free_entropy_is_the_papers_binomial_threshold():
    # 1 - H(1/2 + z/(2 sqrt n)) with z the two-sided 99 % normal quantile 2.5758 (Kloewer et
    # al. 2021, methods); for large n it is (2/ln 2) (z/(2 sqrt n))^2 to first order.
    n = 1_000_000
    z = 2.5758293035489
    expected = 2.0 / math.log(2.0) * (z / (2.0 * math.sqrt(n))) ** 2
    assert information.free_entropy(n, 0.99) == pytest.approx(expected, rel=1e-3)
    assert information.free_entropy(100, 0.99) > information.free_entropy(10_000, 0.99)


def test_independent_noise_holds_no_mantissa_information():
    # Values whose mantissas are independent from point to point: the mantissa bits show only
    # what chance lets through the 99 % threshold (at most a few bits, each a trace), so one
    # bit is kept.
    rng = np.random.default_rng(7)
    a = (1.0 + rng.random((181, 360))).astype(np.float32)
    info = information.bit_information([a])
    m = info[information.HEAD_BITS:]
    # 23 bits tested in two directions at 1 % each: about 0.5 pass by chance; without the
    # threshold every one of them shows some information.
    assert np.count_nonzero(m) <= 3 and m.sum() < 1e-3, m
    assert information.kept_bits(info) == 1


@pytest.mark.parametrize("noise_bits", [6, 10, 14])
def test_kept_bits_stop_where_the_noise_starts(noise_bits):
    # A field in [256, 512) (one exponent) that varies smoothly along its columns and not
    # along its rows, plus independent Gaussian noise whose standard deviation is one unit of
    # its `noise_bits`-th mantissa bit: the bits below the noise hold nothing, those above it
    # are shared by neighbours and kept. Noise of one standard deviation reaches about two
    # bits higher (2 sigma), so the kept count lands from three bits above the noise's bit
    # to that bit.
    rng = np.random.default_rng(11)
    ny, nx = 721, 1440
    smooth = 384.0 + 100.0 * np.sin(np.linspace(0.0, np.pi, ny))[:, None] * np.ones((1, nx))
    ulp = 256.0 * 2.0 ** -noise_bits
    a = (smooth + ulp * rng.standard_normal((ny, nx))).astype(np.float32)
    k = information.kept_bits(information.bit_information([a]))
    assert noise_bits - 3 <= k <= noise_bits, (noise_bits, k)
    eabs, _ = information.rounding_error([a], k)
    assert eabs <= 256.0 * 2.0 ** -(k + 1) * 2 + 1e-9


def test_bit_round_is_to_nearest_ties_to_even():
    # Exact float32 cases: 1 + 2^-11 lies half-way between two 10-bit values and goes to
    # the even one (1.0); 1 + 3 * 2^-11 goes up to 1 + 2^-9; 1 + 2^-11 + 2^-20 goes up.
    a = np.array([1 + 2**-11, 1 + 3 * 2**-11, 1 + 2**-11 + 2**-20, -(1 + 3 * 2**-11)], dtype=np.float32)
    r = information.bit_round(a, 10)
    assert r.tolist() == [1.0, 1 + 2**-9, 1 + 2**-10, -(1 + 2**-9)]


def _documented_kept_bits() -> dict[str, int]:
    """The table "Precision" of docs/output.md: product -> kept mantissa bits."""
    text = (REPO_ROOT / "docs" / "output.md").read_text()
    sec = text.split("### Precision", 1)[1].split("\n### ", 1)[0].split("\n## ", 1)[0]
    out = {}
    for m in re.finditer(r"^\| `([a-z_0-9]+)` \| (\d+) \|", sec, re.M):
        out[m.group(1)] = int(m.group(2))
    assert len(out) >= 20, f"docs/output.md Precision table has {len(out)} rows"
    return out


def table_name(var: str) -> str:
    """The name a file variable's kept bits are listed under (`thick_1000_500` -> `thick`,
    `thick_chg_06h_1000_500` -> `thick_chg`, `mslp_chg_06h` -> `mslp_chg`)."""
    prod = information.product_name(var)
    for chg in ("thick_chg", "mslp_chg"):
        if prod.startswith(chg + "_"):
            return chg
    return prod


def test_files_keep_the_documented_bits(real_runs):
    # leeward's output contract (docs/output.md, "Precision"): each data variable says its
    # kept bits the CF way (quantization_nsb, CF 1.11 section 8.4) and the values hold no
    # set bit below them.
    table = _documented_kept_bits()
    seen = 0
    for sample in REAL_SAMPLES:
        run = real_runs.get(sample)
        assert run.returncode == 0, run.describe()
        for path in run.nc_files:
            with netCDF4.Dataset(path) as ds:
                for name, v in ds.variables.items():
                    if v.ndim not in (3, 4) or "grid_mapping" not in v.ncattrs():
                        continue
                    prod = table_name(name)
                    nsb = int(v.getncattr("quantization_nsb"))
                    assert nsb == table[prod], (path.name, name, nsb, table[prod])
                    v.set_auto_mask(False)
                    a = np.asarray(v[0], dtype=np.float32)
                    a = a[a != np.float32(9.96921e36)]
                    tail = a.view(np.uint32) & np.uint32((1 << (23 - nsb)) - 1)
                    assert not tail.any(), (path.name, name, nsb)
                    seen += 1
    assert seen >= 20, seen
