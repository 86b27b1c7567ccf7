"""The report page rendered by a real browser: headless Chromium (Debian package
``chromium``, /usr/bin/chromium).

Two runs of Chromium:

1. ``--screenshot`` of ``index.html`` itself: the page renders and the
   screenshot is a real, non-trivial image.
2. ``--dump-dom`` of a *probe copy* of the page (``_probe.html``, written by
   this test into the same directory, so every relative link resolves exactly
   as for ``index.html``). The probe adds one small script that, once the page
   has loaded, writes each image's load state (``complete`` and
   ``naturalWidth``/``naturalHeight``) into ``data-*`` attributes. The page
   itself stays free of JavaScript; only the test's copy carries the script.
   A missing or undecodable PNG shows up as ``naturalWidth == 0``.

The test fails (never skips) when Chromium is missing, with the install hint.
"""

from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import matplotlib.image as mpimg  # noqa: E402
import orjson  # noqa: E402
import pytest  # noqa: E402

from service import cli  # noqa: E402

pytestmark = pytest.mark.integration

CHROMIUM = "/usr/bin/chromium"
FLAGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
]
PROBE = """<script>
window.addEventListener("load", function () {
  var imgs = document.querySelectorAll("img");
  for (var i = 0; i < imgs.length; i++) {
    var im = imgs[i];
    im.setAttribute("data-complete", im.complete ? "1" : "0");
    im.setAttribute("data-natural-width", String(im.naturalWidth));
    im.setAttribute("data-natural-height", String(im.naturalHeight));
  }
  document.body.setAttribute("data-probe", "done");
});
</script>"""


def _chromium() -> str:
    if not Path(CHROMIUM).is_file() and shutil.which("chromium") is None:
        pytest.fail("headless Chromium is needed to render the report: apt-get install -y chromium")
    return CHROMIUM if Path(CHROMIUM).is_file() else shutil.which("chromium")


def _backtest() -> dict:
    scores = [
        {"method": m, "series": "ed_child", "horizon": h, "n": 20, "wis": 3.0 * (1 + i) + h * 0.2, "crps": 2.5,
         "coverage_50": 0.5, "coverage_90": 0.88, "log_score": -2.5, "bias": 0.0}
        for i, m in enumerate(("casecloud", "persistence", "trend")) for h in (1, 7)
    ]
    return {
        "stream": "brackenford-ed-ili", "model": "seir_two_band",
        "history": {"first": "2025-09-02", "last": "2025-10-11", "n": 40},
        "horizons": [1, 7], "methods": ["casecloud", "persistence", "trend"], "scores": scores, "per_origin": [],
        "alerts": [{"rule": "child_ed_surge", "series": "ed_child", "threshold": 40.0, "horizon_days": 7, "auc": 0.75,
                    "roc": {"fpr": [0.0, 0.5, 1.0], "tpr": [0.0, 1.0, 1.0], "thresholds": [1.0, 0.5, 0.0]},
                    "episodes": [{"first_exceeding_period": "2025-09-22", "raised_period": None, "lead_days": None}]}],
        "cautions": "Invented numbers for a rendering test.",
    }


@pytest.fixture(scope="module")
def page(tmp_path_factory) -> Path:
    _chromium()  # fail early, before the demo, when Chromium is missing
    demo = tmp_path_factory.mktemp("demo")
    assert cli.main(["demo", "--out", str(demo), "--days", "40", "--particles", "300", "--quiet"]) == 0
    (demo / "backtest.json").write_bytes(orjson.dumps(_backtest()))
    out = tmp_path_factory.mktemp("report")
    assert cli.main([
        "report", "--estimates", str(demo / "estimates.ndjson"), "--alerts", str(demo / "alerts.ndjson"),
        "--observations", str(demo / "observations.ndjson"), "--backtest", str(demo / "backtest.json"), "--out", str(out),
    ]) == 0
    return out / "index.html"


def _run(args: list[str], tmp_path: Path) -> subprocess.CompletedProcess:
    cmd = [_chromium(), *FLAGS, f"--user-data-dir={tmp_path / 'profile'}", *args]
    return subprocess.run(cmd, capture_output=True, timeout=120, check=False)


def test_screenshot_is_a_real_picture(page, tmp_path):
    shot = tmp_path / "shot.png"
    done = _run(["--window-size=1280,4000", f"--screenshot={shot}", page.as_uri()], tmp_path)
    assert done.returncode == 0, done.stderr.decode(errors="replace")[-2000:]
    assert shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    pixels = mpimg.imread(shot)[..., :3]
    assert pixels.shape[:2] == (4000, 1280)
    assert float(pixels.var()) > 1e-3
    # The top band of the page (title, cautions box, facts) is not blank, nor is the figure area below it.
    assert float(pixels[:600].var()) > 1e-3 and float(pixels[1500:3500].var()) > 1e-3
    # The cautions box's red border is drawn near the top (pure-ish red pixels exist in the first 400 rows).
    top = pixels[:400]
    red = (top[..., 0] > 0.6) & (top[..., 1] < 0.35) & (top[..., 2] < 0.35)
    assert red.sum() > 500


def test_every_figure_loads_in_the_browser(page, tmp_path):
    html = page.read_text(encoding="utf-8")
    assert "<script" not in html.lower()  # the page itself needs no JavaScript
    probe = page.parent / "_probe.html"
    probe.write_text(html.replace("</body>", PROBE + "</body>"), encoding="utf-8")
    try:
        done = _run(["--virtual-time-budget=10000", "--dump-dom", probe.as_uri()], tmp_path)
    finally:
        probe.unlink()
    assert done.returncode == 0, done.stderr.decode(errors="replace")[-2000:]
    dom = done.stdout.decode()
    assert 'data-probe="done"' in dom, "the load event never fired"
    images = re.findall(r"<img [^>]*>", dom)
    sources = re.findall(r'<img src="([^"]+)"', html)
    assert len(images) == len(sources) >= 10
    for tag in images:
        src = re.search(r'src="([^"]+)"', tag).group(1)
        width = int(re.search(r'data-natural-width="(\d+)"', tag).group(1))
        height = int(re.search(r'data-natural-height="(\d+)"', tag).group(1))
        assert 'data-complete="1"' in tag, src
        on_disk = mpimg.imread(page.parent / src)
        assert (height, width) == on_disk.shape[:2], f"{src}: browser decoded {width}x{height}, file is {on_disk.shape}"


def test_a_missing_figure_is_caught_by_the_probe(page, tmp_path):
    """The probe must be able to fail: a page pointing at a PNG that does not exist reports width 0."""
    html = page.read_text(encoding="utf-8").replace('src="ess.png"', 'src="missing-figure.png"')
    probe = page.parent / "_probe_broken.html"
    probe.write_text(html.replace("</body>", PROBE + "</body>"), encoding="utf-8")
    try:
        done = _run(["--virtual-time-budget=10000", "--dump-dom", probe.as_uri()], tmp_path)
    finally:
        probe.unlink()
    tag = next(t for t in re.findall(r"<img [^>]*>", done.stdout.decode()) if "missing-figure.png" in t)
    assert 'data-natural-width="0"' in tag
