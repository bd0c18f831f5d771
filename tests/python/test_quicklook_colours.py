"""The quicklooks' colour bands, read back from real images, judged in an independent
perceptual space and for colour-vision deficiency.

leeward designs its ramps in OKLab (src/output/quicklook/ramps.rs). Here the bands are read
from the colour bar of images leeward draws of the GFS sample, and judged with the
``colorspacious`` package (PyPI; CAM02-UCS, Luo, Cui and Li 2006, and the colour-vision
deficiency simulation of Machado, Oliveira and Fernandes 2009 at full severity):

- a sequential scale's bands grow steadily lighter (J' of CAM02-UCS) for normal vision and
  for each simulated deficiency, and neighbouring bands stay apart (Delta E' >= 2.5);
- a reversed scale grows darker the same way;
- a diverging scale is lightest at its centre, equally light at equal distances from it,
  and its two ends stay far apart for every kind of colour vision (Delta E' > 20);
- two images of different fields on the same product scale have identical bands.

Thresholds: a Delta E' of about 1 is a just-noticeable difference in CAM02-UCS (from
memory); 2.5 between neighbouring bands keeps them apart on a screen.
"""

from __future__ import annotations

import subprocess

import numpy as np
import pytest
from PIL import Image

colorspacious = pytest.importorskip("colorspacious")

from conftest import GFS_SAMPLE  # noqa: E402

DEFICIENCIES = ["protanomaly", "deuteranomaly", "tritanomaly"]


def bands_of(png_path, min_bands=6):
    """Colours of the colour bar's bands, left to right: the lowest row of the image
    whose middle 70 % is made of `min_bands` or more runs of one colour of near-equal
    length."""
    img = np.asarray(Image.open(png_path).convert("RGB")).astype(int)
    h, w, _ = img.shape
    for y in range(h - 1, h // 2, -1):
        row = img[y, int(0.15 * w):int(0.85 * w)]
        runs = []
        for px in row:
            if runs and (runs[-1][0] == px).all():
                runs[-1][1] += 1
            else:
                runs.append([px, 1])
        inner = [r for r in runs[1:-1]]
        if len(inner) >= min_bands - 2:
            lengths = [n for _, n in inner]
            if min(lengths) >= 8 and max(lengths) - min(lengths) <= 2:
                # The full bar: walk the whole row between its frame lines.
                full = img[y]
                out, last = [], None
                for px in full:
                    c = tuple(int(v) for v in px)
                    if c != last:
                        out.append([c, 1])
                        last = c
                    else:
                        out[-1][1] += 1
                wide = [c for c, n in out if n >= 8 and c != (255, 255, 255)]
                return np.array(wide, dtype=float) / 255.0
    raise AssertionError(f"no colour bar found in {png_path}")


def lightness(rgb, cvd=None):
    space = "sRGB1" if cvd is None else {"name": "sRGB1+CVD", "cvd_type": cvd, "severity": 100}
    seen = colorspacious.cspace_convert(rgb, space, "sRGB1") if cvd else rgb
    ucs = colorspacious.cspace_convert(np.clip(seen, 0, 1), "sRGB1", "CAM02-UCS")
    return ucs


@pytest.fixture(scope="module")
def gfs_images(leeward_bin, samples_dir, tmp_path_factory):
    out = tmp_path_factory.mktemp("quicklook-colours")
    cfg = out / "cfg.toml"
    cfg.write_text('[quicklook]\nenabled = true\n'
                   'images = ["trop_theta@2", "trop_p@2", "zeta@500", "zeta@300"]\n')
    r = subprocess.run([str(leeward_bin), "process", "--config", str(cfg), "--out", str(out),
                        str(samples_dir / GFS_SAMPLE)], capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    # The step's images (the cycle's tracks map beside them is not one of the step's).
    images = {p.name.split("_072h_")[1].removesuffix(".png"): p for p in out.glob("*_072h_*.png")}
    assert set(images) == {"trop_theta_2", "trop_p_2", "zeta_500", "zeta_300"}, images
    return images


def test_sequential_bands_grow_lighter_for_every_kind_of_colour_vision(gfs_images):
    bands = bands_of(gfs_images["trop_theta_2"])
    assert len(bands) == 20  # 280 to 380 K by 5 K
    for cvd in [None, *DEFICIENCIES]:
        ucs = lightness(bands, cvd)
        j = ucs[:, 0]
        assert (np.diff(j) > 0.8).all(), f"{cvd}: J' {np.round(j, 1)}"
        de = np.linalg.norm(np.diff(ucs, axis=0), axis=1)
        assert de.min() >= 2.5, f"{cvd}: neighbouring bands {np.round(de, 1)}"
    # Evenness in normal vision: no step more than twice another.
    de = np.linalg.norm(np.diff(lightness(bands), axis=0), axis=1)
    assert de.max() / de.min() < 2.0, np.round(de, 2)


def test_a_reversed_scale_grows_darker(gfs_images):
    bands = bands_of(gfs_images["trop_p_2"])
    assert len(bands) == 16  # 100 to 500 hPa by 25 hPa
    for cvd in [None, *DEFICIENCIES]:
        j = lightness(bands, cvd)[:, 0]
        assert (np.diff(j) < -0.8).all(), f"{cvd}: J' {np.round(j, 1)}"


def test_diverging_bands_are_symmetric_and_their_ends_distinct(gfs_images):
    bands = bands_of(gfs_images["zeta_500"])
    n = len(bands)
    assert n == 12  # -30 to 30 by 5 (10^-5 s-1)
    for cvd in [None, *DEFICIENCIES]:
        ucs = lightness(bands, cvd)
        j = ucs[:, 0]
        half = n // 2
        assert (np.diff(j[:half]) > 0).all() and (np.diff(j[half:]) < 0).all(), (cvd, np.round(j, 1))
        ends = np.linalg.norm(ucs[0] - ucs[-1])
        assert ends > 20, f"{cvd}: ends only {ends:.1f} apart"
    j = lightness(bands)[:, 0]
    assert np.abs(j - j[::-1]).max() < 2.0, np.round(j, 1)


def test_the_same_product_scale_gives_the_same_bands(gfs_images):
    a = bands_of(gfs_images["zeta_500"])
    b = bands_of(gfs_images["zeta_300"])
    assert a.shape == b.shape and np.array_equal(a, b)
