"""The cycle page in a real browser.

`leeward demo` publishes its invented cycle through `leeward serve`, which writes a static
HTML page beside each cycle's products. Here a plain static web server (Python's
``http.server``, standing in for any web server of an office) serves the demo's product
directory on localhost, and a real headless Chromium (Debian's ``chromium`` and
``chromium-driver``, installed by tests/setup-system.sh; driven through Selenium, PyPI
``selenium``) loads the page and:

- takes a screenshot (kept as docs/images/cycle-page.png when LEEWARD_PAGE_SHOT names a file);
- finds every image of every step, each loaded by the browser (natural width > 0), and
  the same set of images as the steps' manifests list;
- steps through the lead times with the keyboard (right and left arrows, Home, End), and
  checks that one step at a time is shown, the one the key asked for;
- reads each step's facts (state, arrival, publication, latency, what was missing) and
  follows its link to the NetCDF file (served, with the size the manifest gives).
"""

from __future__ import annotations

import functools
import http.server
import json
import os
import shutil
import subprocess
import threading
import urllib.request
from pathlib import Path

import pytest

CHROMIUM = shutil.which("chromium") or "/usr/bin/chromium"
DRIVER = shutil.which("chromedriver") or "/usr/bin/chromedriver"


@pytest.fixture(scope="module")
def demo_cycle(leeward_bin, tmp_path_factory):
    d = tmp_path_factory.mktemp("page-demo")
    r = subprocess.run([str(leeward_bin), "demo", "--dir", str(d)], capture_output=True, text=True,
                       timeout=600)
    assert r.returncode == 0, r.stdout[-3000:] + r.stderr[-3000:]
    return d / "products" / "regional" / "20260314T0000Z"


@pytest.fixture(scope="module")
def served(demo_cycle):
    handler = functools.partial(http.server.SimpleHTTPRequestHandler, directory=str(demo_cycle))
    handler.log_message = lambda *a, **k: None
    httpd = http.server.ThreadingHTTPServer(("127.0.0.1", 0), handler)
    # A browser drops connections for images it no longer needs: not an error here.
    httpd.handle_error = lambda *a: None
    t = threading.Thread(target=httpd.serve_forever, daemon=True)
    t.start()
    yield f"http://127.0.0.1:{httpd.server_address[1]}"
    httpd.shutdown()
    httpd.server_close()


@pytest.fixture(scope="module")
def browser(tmp_path_factory):
    if not (Path(CHROMIUM).exists() and Path(DRIVER).exists()):
        pytest.skip(f"Chromium or its driver not installed ({CHROMIUM}, {DRIVER}): "
                    "run tests/setup-system.sh as root (Debian chromium, chromium-driver)")
    webdriver = pytest.importorskip("selenium.webdriver")
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = CHROMIUM
    profile = tmp_path_factory.mktemp("chromium-profile")
    for flag in ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync",
                 "--disable-dev-shm-usage", f"--user-data-dir={profile}", "--window-size=1400,1000"]:
        opts.add_argument(flag)
    driver = webdriver.Chrome(service=Service(DRIVER), options=opts)
    driver.set_page_load_timeout(60)
    yield driver
    driver.quit()


def manifests(cycle: Path):
    return sorted((json.loads(p.read_text()) for p in cycle.glob("*.json")), key=lambda m: m["lead_hours"])


def wait_for(driver, script, timeout=30):
    from selenium.webdriver.support.ui import WebDriverWait
    return WebDriverWait(driver, timeout, poll_frequency=0.1).until(lambda d: d.execute_script(script))


def shown(driver):
    return driver.execute_script(
        "return Array.from(document.querySelectorAll('section.step'))"
        ".filter(s => getComputedStyle(s).display !== 'none').map(s => s.dataset.label);")


def images_loaded(driver):
    """The shown step's images, once the browser has loaded every one of them."""
    return wait_for(driver, """
        const s = document.querySelector('section.step.shown');
        const imgs = Array.from(s.querySelectorAll('img'));
        if (!imgs.every(i => i.complete && i.naturalWidth > 0)) return null;
        return imgs.map(i => decodeURIComponent(i.src.split('/').pop()));""")


def test_the_demo_page_shows_every_step_and_image_and_steps_with_the_keys(demo_cycle, served, browser):
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys

    ms = manifests(demo_cycle)
    assert len(ms) == 9, [m["lead_hours"] for m in ms]  # 0 to 48 h by 6 h
    pages = list(demo_cycle.glob("*.html"))
    assert [p.name for p in pages] == ["c255_20260314T0000Z.html"], pages
    browser.get(f"{served}/{pages[0].name}")
    wait_for(browser, "return document.body.classList.contains('one') && document.querySelector('section.step.shown');")

    shot = Path(os.environ.get("LEEWARD_PAGE_SHOT", str(demo_cycle.parent / "cycle-page.png")))
    assert browser.save_screenshot(str(shot)), "screenshot"
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and shot.stat().st_size > 20_000

    labels = [f"+{m['lead_hours']:03d}h" for m in ms]
    # Every image of the page, as the manifests list them, in the DOM.
    # and the cycle's cyclone tracks over the latest mean sea-level pressure.
    tracks = "c255_20260314T0000Z_cyclones"
    in_dom = browser.execute_script("return Array.from(document.images).map(i => decodeURIComponent(i.src.split('/').pop()));")
    assert sorted(in_dom) == sorted([i for m in ms for i in m["images"]] + [f"{tracks}.png"])
    # The tracks' map is shown above the lead times, loaded by the browser, with links to
    # the tracks' files, which are served.
    track_img = wait_for(browser, """
        const i = document.querySelector('section.tracks img');
        return i && i.complete && i.naturalWidth > 0 ? decodeURIComponent(i.src.split('/').pop()) : null;""")
    assert track_img == f"{tracks}.png"
    links = browser.execute_script(
        "return Array.from(document.querySelectorAll('section.tracks p a')).map(a => a.href);")
    assert sorted(l.split('/')[-1] for l in links) == [f"{tracks}.geojson", f"{tracks}.nc"]
    for l in links:
        with urllib.request.urlopen(l, timeout=30) as r:
            assert r.status == 200 and int(r.headers["Content-Length"]) == (
                demo_cycle / l.split('/')[-1]).stat().st_size
    # It opens on the latest step; Home goes to the first.
    assert shown(browser) == [labels[-1]]
    body = browser.find_element(By.TAG_NAME, "body")
    body.send_keys(Keys.HOME)
    assert shown(browser) == [labels[0]]
    # Right arrow through every step: one shown at a time, its images loaded by the browser.
    for k, m in enumerate(ms):
        if k:
            body.send_keys(Keys.ARROW_RIGHT)
        assert shown(browser) == [labels[k]], (k, shown(browser))
        assert browser.execute_script("return location.hash") == f"#step-{k}"
        assert images_loaded(browser) == m["images"], labels[k]
        facts = browser.execute_script(
            "const s = document.querySelector('section.step.shown');"
            "return Object.fromEntries(Array.from(s.querySelectorAll('.facts tr')).map("
            "r => [r.cells[0].textContent, r.cells[1].textContent]));")
        assert facts["state"] == m["state"]
        for key in ("last input arrived", "published", "latency", "valid", "missing", "NetCDF"):
            assert key in facts, (labels[k], facts)
        assert facts["missing"] == ("nothing" if not m["missing"] else facts["missing"])
        href = browser.execute_script("return document.querySelector('section.step.shown a.product').href")
        with urllib.request.urlopen(href, timeout=30) as r:
            assert r.status == 200 and int(r.headers["Content-Length"]) == m["product_bytes"]
    # Past the end it stays on the last; left arrow and End move as asked.
    body.send_keys(Keys.ARROW_RIGHT)
    assert shown(browser) == [labels[-1]]
    body.send_keys(Keys.ARROW_LEFT, Keys.ARROW_LEFT)
    assert shown(browser) == [labels[-3]]
    body.send_keys(Keys.END)
    assert shown(browser) == [labels[-1]]
    # A lead time's address opens that step.
    browser.get(f"{served}/{pages[0].name}#step-2")
    wait_for(browser, "return document.querySelector('section.step.shown');")
    assert shown(browser) == [labels[2]]


def test_the_page_reads_without_scripts(demo_cycle):
    """Every step, image and NetCDF link is in the page itself (a browser with scripts off
    lists them one under the other)."""
    html = (demo_cycle / "c255_20260314T0000Z.html").read_text()
    ms = manifests(demo_cycle)
    assert html.count('<section class="step"') == len(ms)
    for m in ms:
        assert f'href="{m["product"]}"' in html
        for i in m["images"]:
            assert f'src="{i}"' in html
    # The cycle's cyclone tracks: their map and their files.
    assert html.count('<section class="tracks">') == 1
    for x in ('src="c255_20260314T0000Z_cyclones.png"', 'href="c255_20260314T0000Z_cyclones.nc"',
              'href="c255_20260314T0000Z_cyclones.geojson"'):
        assert x in html, x
    # Nothing from elsewhere: no address with a scheme or a host.
    assert "http://" not in html and "https://" not in html and "src=\"//" not in html
