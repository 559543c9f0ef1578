"""The example study's report in a real browser: headless Chromium (installed by .ci/run from the Debian
packages; skipped with the reason where none is found).

Three runs of the browser: the report itself with console logging (any console message is a failure: the page
has no script, so a message means a resource or parsing problem); a copy with a probe script that records
every load error and the drawn size of every <img> and <svg> (the report itself stays free of JavaScript);
and a screenshot kept as a test artefact (its path is printed; under GROUPMODEL_ARTEFACTS when that is set).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from groupmodel.cli import main

ROOT = Path(__file__).resolve().parents[2]
BROWSERS = ("chromium", "chromium-browser", "google-chrome", "chrome")
PROBE = """<script>
var gmErrors = [];
window.addEventListener('error', function (e) {
  gmErrors.push(String(e.message || (e.target && (e.target.src || e.target.href)) || 'error'));
}, true);
var gmConsole = console.error;
console.error = function () { gmErrors.push('console: ' + Array.prototype.join.call(arguments, ' ')); };
window.addEventListener('load', function () {
  var out = [], els = document.querySelectorAll('img, svg');
  for (var i = 0; i < els.length; i++) {
    var r = els[i].getBoundingClientRect();
    out.push({tag: els[i].tagName.toLowerCase(), w: r.width, h: r.height,
              natural: els[i].naturalWidth === undefined ? -1 : els[i].naturalWidth,
              complete: els[i].complete === undefined ? true : els[i].complete});
  }
  var pre = document.createElement('pre');
  pre.id = 'gm-probe';
  pre.textContent = JSON.stringify({images: out, errors: gmErrors});
  document.body.appendChild(pre);
});
</script>"""


def _browser() -> str:
    for name in BROWSERS:
        found = shutil.which(name)
        if found:
            return found
    pytest.skip("no Chromium found (.ci/run installs the Debian package 'chromium'; apt-get install -y chromium)")


def _run(browser: str, profile: Path, *args: str) -> subprocess.CompletedProcess:
    cmd = [browser, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--hide-scrollbars",
           f"--user-data-dir={profile}", "--virtual-time-budget=5000", *args]
    try:
        return subprocess.run(cmd, capture_output=True, text=True, timeout=180)
    except subprocess.TimeoutExpired:
        pytest.fail(f"the browser did not finish within 180 s: {' '.join(cmd)}")


@pytest.fixture(scope="module")
def report(tmp_path_factory: pytest.TempPathFactory) -> Path:
    out = tmp_path_factory.mktemp("browser") / "results"
    code = main(["fit", str(ROOT / "example_study" / "model.json"), "--out", str(out), "--permutations", "100",
                 "--seed", "1", "--tfce"])
    assert code == 0
    return out / "report.html"


def test_report_opens_without_console_messages(report: Path, tmp_path: Path) -> None:
    browser = _browser()
    proc = _run(browser, tmp_path / "profile", "--enable-logging=stderr", "--v=0", "--dump-dom", report.as_uri())
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert 'id="caution"' in proc.stdout  # the whole page was read
    console = [line for line in proc.stderr.splitlines() if ":CONSOLE" in line]
    assert console == []


def test_every_image_is_drawn_with_a_size(report: Path, tmp_path: Path) -> None:
    browser = _browser()
    probe = tmp_path / "probe.html"
    probe.write_text(report.read_text(encoding="utf-8").replace("<head>", "<head>" + PROBE, 1), encoding="utf-8")
    proc = _run(browser, tmp_path / "profile", "--window-size=1280,2000", "--dump-dom", probe.as_uri())
    assert proc.returncode == 0, proc.stderr[-2000:]
    found = re.search(r'<pre id="gm-probe">(.*?)</pre>', proc.stdout, re.S)
    assert found, "the probe did not run"
    result = json.loads(found.group(1).replace("&quot;", '"').replace("&amp;", "&"))
    assert result["errors"] == []
    n_img = report.read_text(encoding="utf-8").count("<img ")
    images = result["images"]
    assert sum(i["tag"] == "img" for i in images) == n_img > 0 and any(i["tag"] == "svg" for i in images)
    for i in images:
        assert i["w"] > 0 and i["h"] > 0 and i["complete"], i
        assert i["tag"] != "img" or i["natural"] > 0, i


def test_screenshot_kept_as_artefact(report: Path, tmp_path: Path) -> None:
    browser = _browser()
    where = Path(os.environ.get("GROUPMODEL_ARTEFACTS", tmp_path))
    where.mkdir(parents=True, exist_ok=True)
    shot = where / "report_screenshot.png"
    proc = _run(browser, tmp_path / "profile", "--window-size=1280,4000", f"--screenshot={shot}", report.as_uri())
    assert proc.returncode == 0, proc.stderr[-2000:]
    from PIL import Image

    with Image.open(shot) as im:
        assert im.size == (1280, 4000)
        colours = im.convert("RGB").resize((64, 200)).getcolors(64 * 200)
    assert colours is not None and len(colours) > 20  # a drawn page, not a blank one
    print(f"\nscreenshot of the example study's report: {shot}")
