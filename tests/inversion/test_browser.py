"""Every kind of report rendered in a real browser (headless Chromium).

Checks, per report kind: the page loads with no console error and no script error,
every image decodes, no text overflows its box (block elements whose content is wider
than the element, tables wider than the page body, a page wider than the window). One
screenshot per kind is kept under the pytest temporary folder
(``<basetemp>/browser_screenshots``). Skipped, with the reason, where no Chromium is
installed (``make test`` installs the Debian package when it runs as root).
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from inversion.cli import main
from tests.inversion.test_plots_report import _fake_sample_folder, _synthetic_posterior

BROWSER = next((shutil.which(b) for b in ("chromium", "chromium-browser")
                if shutil.which(b)), None)
pytestmark = pytest.mark.skipif(
    BROWSER is None, reason="no Chromium on this machine (Debian: apt-get install chromium; "
    "make test installs it when run as root)")

#: Injected into a copy of the report: collects errors, decodes images, measures boxes.
_CHECK = """<script>
window.__errs = [];
window.addEventListener('error', e => window.__errs.push('error: ' + (e.message ||
  (e.target && (e.target.src || '').slice(0, 40)))), true);
for (const k of ['error', 'warn']) { const o = console[k];
  console[k] = (...a) => { window.__errs.push(k + ': ' + a.join(' ')); o.apply(console, a); }; }
window.addEventListener('load', () => {
  const imgs = [...document.images];
  const ok = imgs.map(i => i.complete && i.naturalWidth > 0 && i.naturalHeight > 0);
  const over = [];
  for (const el of document.querySelectorAll('td,th,p,li,h1,h2,h3,figcaption,pre,figure')) {
    if (el.id === '__check') continue;
    if (el.scrollWidth > el.clientWidth + 1) over.push(el.tagName + ': ' +
                                                       el.textContent.slice(0, 80));
  }
  const right = document.body.getBoundingClientRect().right;
  for (const t of document.querySelectorAll('table, img')) {
    if (t.getBoundingClientRect().right > right + 1) over.push(t.tagName + ' wider than the '
      + 'page: ' + (t.alt || t.textContent.slice(0, 60)));
  }
  const out = document.createElement('pre'); out.id = '__check';
  out.style.display = 'none';
  out.textContent = JSON.stringify({errors: window.__errs, images: imgs.length,
    bad_images: imgs.filter((_, j) => !ok[j]).map(i => i.alt), overflow: over,
    page_overflow: document.documentElement.scrollWidth > window.innerWidth + 1});
  document.body.appendChild(out);
});
</script>"""

_FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
          "--disable-background-networking", "--disable-component-update", "--disable-sync",
          "--hide-scrollbars", "--window-size=1280,2400", "--enable-logging=stderr", "--v=0"]


def _chromium(args: list[str], profile: Path) -> subprocess.CompletedProcess:
    profile.mkdir(parents=True, exist_ok=True)
    return subprocess.run([BROWSER, *_FLAGS, f"--user-data-dir={profile}", *args],
                          capture_output=True, text=True, timeout=120, check=False)


@pytest.fixture(scope="module")
def report_folders(shared_results, tmp_path_factory) -> dict[str, Path]:
    """One result folder of each kind, each with its report.html."""
    base = tmp_path_factory.mktemp("browser")
    folders = {k: shared_results[k] for k in ("fit", "rank", "star", "batch")}
    folders["sample"] = _fake_sample_folder(base / "sample")
    rng = np.random.default_rng(3)
    els = ["Li", "Na", "K", "Cu", "Zn", "Ga", "Rb", "Cs"]
    y = rng.normal(0.0, 0.3, len(els))
    a = _synthetic_posterior(base / "run_a", els, y, 0.0, rng, ["CI", "H"])
    b = _synthetic_posterior(base / "run_b", els[:-1], y[:-1], 0.5, rng, ["CV"])
    folders["compare"] = base / "compare"
    assert main(["compare", str(a), str(b), "--out", str(folders["compare"])]) == 0
    for f in folders.values():
        assert main(["report", str(f)]) == 0
    return folders


def _check(html: str, tmp_path: Path, shot: Path | None = None) -> tuple[dict, str]:
    """Load the page with the checks injected (and take its screenshot in the same run)."""
    checked = tmp_path / "checked.html"
    checked.write_text(html.replace("<head>", "<head>" + _CHECK, 1), encoding="utf-8")
    extra = [f"--screenshot={shot}"] if shot is not None else []
    run = _chromium(["--virtual-time-budget=15000", *extra, "--dump-dom", checked.as_uri()],
                    tmp_path / "profile")
    found = re.search(r'<pre id="__check"[^>]*>(.*?)</pre>', run.stdout, re.S)
    assert found, run.stderr[-2000:]
    res = json.loads(found.group(1).replace("&quot;", '"').replace("&lt;", "<").replace("&gt;", ">")
                     .replace("&amp;", "&"))
    return res, run.stderr


def test_the_browser_check_catches_defects(tmp_path):
    """A page with a broken image, a console error and a word wider than its cell."""
    page = ("<!DOCTYPE html><html><head><style>td{width:40px;max-width:40px}</style></head>"
            "<body><img alt='broken' src='data:image/png;base64,iVBORw0KGgo='>"
            "<table><tr><td><p style='width:40px'>" + "x" * 200 + "</p></td></tr></table>"
            "<script>console.error('boom')</script></body></html>")
    res, _ = _check(page, tmp_path)
    assert res["bad_images"] == ["broken"]
    assert any("boom" in e for e in res["errors"])
    assert res["overflow"]


@pytest.mark.parametrize("kind", ["fit", "rank", "sample", "compare", "star", "batch"])
def test_report_renders_cleanly_in_chromium(kind, report_folders, tmp_path,
                                            tmp_path_factory):
    html = (report_folders[kind] / "report.html").read_text(encoding="utf-8")
    shots = tmp_path_factory.getbasetemp() / "browser_screenshots"
    shots.mkdir(exist_ok=True)
    shot = shots / f"{kind}.png"
    res, stderr = _check(html, tmp_path, shot)
    assert res["errors"] == [], res["errors"]
    assert res["images"] >= 1 and res["bad_images"] == [], res
    assert res["overflow"] == [] and not res["page_overflow"], res["overflow"]
    console = [ln for ln in stderr.splitlines() if "CONSOLE" in ln and "ERROR" in ln]
    assert console == [], console
    from PIL import Image

    with Image.open(shot) as im:
        assert im.size == (1280, 2400)
        assert len(set(im.convert("L").resize((64, 120)).getdata())) > 5  # not blank
