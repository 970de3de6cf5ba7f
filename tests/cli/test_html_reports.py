"""Each job's HTML report opens in a real headless browser with every figure drawn and no console error.

The browser is Debian's ``chromium`` (installed by ``.ci/run``). Without it the
test is skipped, except under ``CI=true`` where a missing browser fails it.
Figures are checked in the page itself: after the load event every ``<img>``
must be complete with ``naturalWidth > 0`` (HTML Living Standard,
HTMLImageElement.naturalWidth is 0 for an image that failed to decode).
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from densemem.cli import main

pytest.importorskip("matplotlib")

FLAGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking", "--no-first-run",
         "--disable-component-update", "--disable-sync"]

# Injected by the test only (the reports carry no script): records errors, then marks the page once loaded.
PROBE = """<script>
window.__errors = [];
window.addEventListener("error", e => window.__errors.push(String(e.message || e.type)), true);
const __ce = console.error; console.error = (...a) => { window.__errors.push(a.join(" ")); __ce(...a); };
window.addEventListener("load", () => {
  const imgs = Array.from(document.images);
  const broken = imgs.filter(i => !(i.complete && i.naturalWidth > 0)).length;
  document.documentElement.setAttribute("data-probe",
    "images=" + imgs.length + ";broken=" + broken + ";errors=" + window.__errors.length);
});
</script>"""


def _browser() -> str:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if found is None:
        if os.environ.get("CI") == "true":
            pytest.fail("CI=true but chromium is not installed (.ci/run installs it with apt-get)")
        pytest.skip("chromium is not installed (apt-get install -y chromium)")
    return found


@pytest.fixture(scope="module")
def reports(tmp_path_factory):
    """One report of each job, written by the commands themselves on small runs."""
    import numpy as np
    from sklearn.datasets import load_digits

    d = tmp_path_factory.mktemp("reports")
    x = load_digits().data.astype(np.float32)[:400]
    np.save(d / "digits.npy", x)
    assert main(["build", str(d / "digits.npy"), str(d / "store"), "--normalize", "-q"]) == 0
    runs = {
        "tune": ["tune", str(d / "store"), "--n-betas", "5", "--n-queries", "32"],
        "dedup": ["dedup", str(d / "digits.npy"), str(d / "plan"), "--threshold", "0.97"],
        "capacity": ["capacity", "--models", "hebbian", "pseudo_inverse", "--dims", "12", "16", "--n-trials", "1",
                     "--max-patterns", "64"],
        "bench": ["bench", "--quick", "--dataset", "unit", "--methods", "exact", "--betas", "8"],
    }
    out = {}
    for name, args in runs.items():
        assert main([*args, "-q", "--html", str(d / f"{name}.html")]) == 0, name
        out[name] = d / f"{name}.html"
    assert main(["demo", "--out", str(d / "demo"), "--photos", "150", "-q"]) == 0
    out["demo"] = d / "demo" / "report.html"
    return out


def _open(browser: str, page: Path, tmp: Path, *extra: str) -> subprocess.CompletedProcess:
    profile = tmp / f"profile-{page.stem}-{len(extra)}"
    return subprocess.run([browser, *FLAGS, f"--user-data-dir={profile}", "--enable-logging=stderr", "--v=0",
                           *extra, page.as_uri()], capture_output=True, text=True, timeout=120)


@pytest.mark.parametrize("job", ["tune", "dedup", "capacity", "bench", "demo"])
def test_report_renders_in_a_browser(reports, job, tmp_path):
    browser = _browser()
    page = reports[job]
    html = page.read_text(encoding="utf-8")
    assert "<table" in html and "data:image/png;base64," in html
    # self-contained: no script, no link to the network or to another file
    assert "<script" not in html.lower()
    assert not re.search(r"""(src|href)\s*=\s*["'](?!data:|#)""", html, re.I)
    assert not re.search(r"https?://|@import|url\(", html, re.I)

    probed = tmp_path / f"{job}-probe.html"
    probed.write_text(html.replace("<head>", "<head>\n" + PROBE, 1), encoding="utf-8")
    res = _open(browser, probed, tmp_path, "--virtual-time-budget=5000", "--dump-dom")
    assert res.returncode == 0, res.stderr[-2000:]
    mark = re.search(r'data-probe="images=(\d+);broken=(\d+);errors=(\d+)"', res.stdout)
    assert mark is not None, "the page never finished loading"
    images, broken, errors = map(int, mark.groups())
    assert images == html.count("<img") and images >= 1
    assert broken == 0 and errors == 0
    console = [ln for ln in res.stderr.splitlines() if "CONSOLE" in ln and ("rror" in ln or "Uncaught" in ln)]
    assert console == []

    shot = tmp_path / f"{job}.png"
    res = _open(browser, page, tmp_path, "--window-size=1280,2000", f"--screenshot={shot}")
    assert res.returncode == 0, res.stderr[-2000:]
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (open standard)
    assert shot.stat().st_size > 20_000  # a blank 1280x2000 page compresses far below this


def test_reports_hold_the_printed_tables(reports, capsys, tmp_path):
    """Without a browser: each page carries the words and columns its command prints."""
    text = {job: reports[job].read_text(encoding="utf-8") for job in reports}
    assert "verdict: for sharp recall use beta = " in text["tune"] and "predicted against measured" in text["tune"]
    assert "<th>metastable</th>" in text["tune"] and "<dl class=\"legend\">" in text["tune"]
    assert "&gt;= 64 (cap)" in text["capacity"] and "<th>success at capacity</th>" in text["capacity"]
    assert "<th>base ms</th>" in text["bench"] and "<th>held MiB</th>" in text["bench"]
    assert "<th>kept item</th>" in text["dedup"]
    assert "Invented data" in text["demo"] and text["demo"].count("<img") == 3
    # the --html file is new unless asked, like every writer
    assert main(["capacity", "--models", "hebbian", "--dims", "8", "--n-trials", "1", "-q",
                 "--html", str(reports["capacity"])]) == 2
    assert "exists" in capsys.readouterr().err
    assert reports["capacity"].read_text(encoding="utf-8") == text["capacity"]
