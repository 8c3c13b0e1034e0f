"""The report opens in headless Chromium (Debian's chromium, installed in CI
by .ci/install_chromium) with no console message and every image loaded.

A small checker page next to the report loads it in an iframe (file access
between local files is allowed with --allow-file-access-from-files), waits for
it to load and writes, for every <img>, whether it decoded and its natural
size into its own DOM, which --dump-dom prints.  Console messages (script
errors, blocked requests, Content-Security-Policy violations) appear on
stderr with --enable-logging=stderr as lines holding 'CONSOLE'.
"""

import json
import os
import pathlib
import re
import shutil
import subprocess

import pytest
import tifffile

from waves import synthetic as S
from waves.render import DarkfieldStyle
from waves.report import write_report
from waves.report.html import SECTIONS
from waves.result import analyse_file

CHROMIUM = "/usr/bin/chromium"
FLAGS = [
    "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
    "--disable-background-networking", "--disable-component-update", "--disable-sync",
    "--enable-logging=stderr", "--v=0", "--allow-file-access-from-files", "--virtual-time-budget=15000",
]

CHECKER = """<!DOCTYPE html><html><head><meta charset="utf-8"><title>check</title></head><body>
<iframe id="frame" src="REPORT" style="width:1200px;height:900px"></iframe><pre id="result">pending</pre>
<script>
document.getElementById('frame').addEventListener('load', function () {
  var out = document.getElementById('result');
  try {
    var d = this.contentDocument, imgs = d.images, r = [];
    for (var i = 0; i < imgs.length; i++) {
      r.push({alt: imgs[i].alt, complete: imgs[i].complete, w: imgs[i].naturalWidth, h: imgs[i].naturalHeight});
    }
    var ids = [];
    d.querySelectorAll('section').forEach(function (s) { ids.push(s.id); });
    out.textContent = 'RESULT ' + JSON.stringify({images: r, sections: ids, title: d.title});
  } catch (e) { out.textContent = 'ERROR ' + e; }
});
</script></body></html>
"""


def _chromium() -> str:
    path = CHROMIUM if os.access(CHROMIUM, os.X_OK) else shutil.which("chromium")
    if path is None:
        if os.environ.get("CI"):
            pytest.fail("chromium is not installed in CI: .ci/run must call .ci/install_chromium first")
        pytest.skip("chromium not installed (run .ci/install_chromium, as root on Debian, to test the report in it)")
    return path


def _open(page: pathlib.Path, profile: pathlib.Path) -> tuple[str, list[str]]:
    """Dump the DOM of `page` after load; returns it and the console lines."""
    proc = subprocess.run(
        [_chromium(), *FLAGS, f"--user-data-dir={profile}", "--dump-dom", page.resolve().as_uri()],
        capture_output=True, text=True, timeout=180,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    console = [line for line in proc.stderr.splitlines() if "CONSOLE" in line]
    return proc.stdout, console


def _check(report: pathlib.Path, profile: pathlib.Path) -> tuple[dict, list[str]]:
    checker = report.parent / "check-report.html"
    checker.write_text(CHECKER.replace("REPORT", report.name), encoding="utf-8")
    dom, console = _open(checker, profile)
    m = re.search(r"RESULT (\{.*\})</pre>", dom)
    assert m, f"the checker page did not finish: {dom[-500:]}"
    return json.loads(m.group(1).replace("&amp;", "&").replace("&quot;", '"')), console


@pytest.fixture(scope="module")
def report(tmp_path_factory):
    base = tmp_path_factory.mktemp("browser")
    movie = S.synthetic_movie(
        (130, 80, 80), pixel_size_um=20.0, frame_interval_s=20.0, speed_um_per_min=100.0,
        sources=[S.SpiralSource(800.0, 800.0, 6.0, charge=-1)], style=DarkfieldStyle(noise=0.02), seed=2,
    )
    stack = base / "field.tif"
    tifffile.imwrite(stack, movie.data, imagej=True, resolution=(1 / 20.0, 1 / 20.0),
                     metadata={"axes": "TYX", "unit": "um", "finterval": 20.0})
    analyse_file(stack, out=base / "res")
    return write_report(base / "res", stack_path=stack, movie_frames=12)


def test_report_opens_with_every_image_loaded(report, tmp_path):
    result, console = _check(report, tmp_path / "profile")
    assert console == []
    assert result["sections"] == list(SECTIONS)
    n_img = report.read_text(encoding="utf-8").count("<img ")
    assert len(result["images"]) == n_img >= 10
    for img in result["images"]:
        assert img["complete"] and img["w"] > 0 and img["h"] > 0, img
    assert "waves report" in result["title"]


def test_report_alone_gives_no_console_message(report, tmp_path):
    dom, console = _open(report, tmp_path / "profile")
    assert console == []
    assert 'id="disclaimer"' in dom and "not a clinical" in dom


def test_the_check_catches_a_broken_report(report, tmp_path):
    # the harness must be able to fail: a report with a remote image is blocked
    # by its Content-Security-Policy (a console message) and the image does not load
    text = report.read_text(encoding="utf-8")
    broken = report.parent / "broken.html"
    first = text.index("<img ")
    broken.write_text(text[:first] + '<img src="https://example.invalid/x.png" alt="remote">' + text[first:],
                      encoding="utf-8")
    result, console = _check(broken, tmp_path / "profile")
    assert any("Content Security Policy" in line for line in console)
    remote = [img for img in result["images"] if img["alt"] == "remote"]
    assert remote and remote[0]["w"] == 0
