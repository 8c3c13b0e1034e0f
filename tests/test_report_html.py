"""The HTML report of a results folder: every section, self-contained
(embedded images only, no network), provenance and numbers from the
folder, movie within its limits; and `waves demo`."""

import argparse
import base64
import hashlib
import html.parser
import io
import json
import re
import shutil

import numpy as np
import pytest
import tifffile
from PIL import Image

from waves import demo
from waves import synthetic as S
from waves.errors import InputError, WavesError
from waves.render import DarkfieldStyle
from waves.report import REPORT_NAME, write_report
from waves.report.html import CSP, SECTIONS
from waves.result import analyse_file


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    """A results folder of a synthetic spiral (truth: charge +1, clockwise,
    core at (900, 1000) um, period 6 min; waves.synthetic) and its stack."""
    base = tmp_path_factory.mktemp("report")
    movie = S.synthetic_movie(
        (150, 96, 96), pixel_size_um=20.0, frame_interval_s=20.0, speed_um_per_min=100.0,
        sources=[S.SpiralSource(900.0, 1000.0, 6.0, charge=1)], style=DarkfieldStyle(noise=0.02), seed=4,
    )
    stack = base / "spiral.tif"
    tifffile.imwrite(stack, movie.data, imagej=True, resolution=(1 / 20.0, 1 / 20.0),
                     metadata={"axes": "TYX", "unit": "um", "finterval": 20.0})
    out = base / "res"
    analyse_file(stack, out=out)
    return stack, out


@pytest.fixture(scope="module")
def report(results):
    stack, out = results
    path = write_report(out, stack_path=stack, movie_frames=24)
    return path, path.read_text(encoding="utf-8")


class _Collect(html.parser.HTMLParser):
    """Gathers tag attributes and section ids with the standard-library parser."""

    def __init__(self):
        super().__init__()
        self.imgs, self.sections, self.tags, self.links = [], [], [], []
        self.meta = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        if tag == "img":
            self.imgs.append(a)
        if tag == "section":
            self.sections.append(a.get("id"))
        if tag == "meta":
            self.meta.append(a)
        for key in ("href", "src", "srcset", "data"):
            if key in a and tag != "img":
                self.links.append(a[key])


def _parse(text):
    p = _Collect()
    p.feed(text)
    return p


# the sections and figures issue 6 asks of the report, written out independently of the code
REQUIRED_SECTIONS = ["summary", "spiral-cores", "centres", "period-timecourse", "dispersion", "model", "maps", "movie",
                     "warnings", "calibration", "provenance", "meaning"]
REQUIRED_FIGURES = ["mean image", "phase snapshot", "period map", "speed map", "territory map",
                    "period time course", "period and speed histograms", "dispersion scatter", "kymograph",
                    "core tracks", "movie"]


def test_report_holds_every_section_in_order(report):
    path, text = report
    assert path.name == REPORT_NAME
    p = _parse(text)
    assert p.sections == REQUIRED_SECTIONS == list(SECTIONS)
    for heading in SECTIONS.values():
        assert f"<h2>{heading}</h2>" in text.replace("&#x27;", "'")
    alts = [img["alt"] for img in p.imgs]
    for name in REQUIRED_FIGURES:
        assert name in alts, name


def test_report_is_self_contained(report):
    _, text = report
    p = _parse(text)
    # no script, no external resource of any kind; a CSP forbids network access
    assert "script" not in p.tags and "link" not in p.tags and "iframe" not in p.tags
    assert not p.links
    assert not re.search(r"(?i)\b(?:https?|ftp)://", text)
    assert {"http-equiv": "Content-Security-Policy", "content": CSP} in p.meta
    assert "default-src 'none'" in CSP
    # every image is an embedded PNG or GIF that Pillow (the reference decoder) opens
    assert len(p.imgs) >= 10
    for img in p.imgs:
        m = re.fullmatch(r"data:image/(png|gif);base64,([A-Za-z0-9+/=]+)", img["src"])
        assert m, img["src"][:40]
        decoded = Image.open(io.BytesIO(base64.b64decode(m.group(2))))
        assert decoded.format == m.group(1).upper()
        assert min(decoded.size) >= 100
        assert img.get("alt")


def test_report_numbers_and_provenance_come_from_the_folder(results, report):
    stack, out = results
    _, text = report
    s = json.loads((out / "summary.json").read_text())
    # the summary table shows the median period to 4 significant digits (truth 6 min, waves.synthetic)
    assert f"{s['period_min']['median']:.4g}" in text
    assert s["period_min"]["median"] == pytest.approx(6.0, rel=0.03)
    assert "um/min" in text and "min</td>" in text
    # provenance: the file's sha256 (hashlib the reference), shape, dtype, version, options
    assert hashlib.sha256(stack.read_bytes()).hexdigest() in text
    assert "150 x 96 x 96" in text and "uint8" in text
    assert s["analysis"]["waves_version"] in text
    assert "min_coherence" in text and "period_band_min" in text
    # the core table: truth says one core of charge +1 turning clockwise
    (core,) = s["spiral_cores"]
    assert core["rotation"] == "clockwise"
    assert "<td>clockwise</td>" in text
    # calibration and the disclaimer
    assert "<td>imagej</td>" in text
    assert s["disclaimer"].capitalize() in text
    assert "not a clinical, diagnostic or safety judgement" in text
    for term in ("Median, quartiles and n", "Wave period (min)", "Front speed (um/min)", "Spiral cores, charge"):
        assert term in text


def test_movie_is_small_and_embedded(results, report):
    _, out = results
    _, text = report
    gif = out / "movie.gif"
    assert gif.is_file() and gif.stat().st_size <= 5_000_000
    with Image.open(gif) as im:
        assert im.format == "GIF" and im.n_frames == 24
    # an MP4 beside it exactly when matplotlib finds an ffmpeg encoder
    from matplotlib import animation

    assert (out / "movie.mp4").is_file() == animation.writers.is_available("ffmpeg")
    # the same bytes are embedded in the report
    assert base64.b64encode(gif.read_bytes()).decode() in text
    # no temporary files are left behind (atomic writes)
    assert not [p.name for p in out.iterdir() if p.name.startswith(".")]


def test_report_without_the_stack_says_why(results, tmp_path):
    _, out = results
    copy = tmp_path / "old"
    shutil.copytree(out, copy, ignore=shutil.ignore_patterns("report.html", "movie.*", "period_min.tif"))
    s = json.loads((copy / "summary.json").read_text())
    s["source"]["path"] = str(tmp_path / "moved-away.tif")
    (copy / "summary.json").write_text(json.dumps(s))
    text = write_report(copy, movie_frames=8).read_text()
    assert "analysed stack was not found" in text
    assert _parse(text).sections == REQUIRED_SECTIONS
    assert not (copy / "movie.gif").exists()
    # that map was removed from the folder: its place says so
    assert "Period map: not in this results folder" in text and 'alt="period map"' not in text


def test_report_refuses_a_folder_without_summary(tmp_path):
    with pytest.raises(InputError, match="no summary.json"):
        write_report(tmp_path)
    with pytest.raises(InputError, match="not a folder"):
        write_report(tmp_path / "nope")
    (tmp_path / "summary.json").write_text("{not json")
    with pytest.raises(InputError, match="not valid JSON"):
        write_report(tmp_path)


def test_report_options_are_checked(results):
    _, out = results
    with pytest.raises(WavesError, match="movie_frames"):
        write_report(out, movie_frames=500)
    with pytest.raises(WavesError, match="four numbers"):
        write_report(out, kymograph_line_um=(1.0, 2.0))


def test_kymograph_line_option_is_used(results, tmp_path):
    stack, out = results
    copy = tmp_path / "k"
    shutil.copytree(out, copy)
    text = write_report(copy, stack_path=stack, movie=False, kymograph_line_um=(100.0, 200.0, 1500.0, 1700.0),
                        progress=True).read_text()
    assert "line from (0.10, 0.20) mm to (1.50, 1.70) mm" in text
    assert "Movie not made" in text


def test_demo_analyses_the_sample_and_prints_the_report(tmp_path, capsys):
    parser = argparse.ArgumentParser()
    demo.add_arguments(parser)
    args = parser.parse_args(["--out", str(tmp_path / "demo"), "--quiet"])
    assert demo.run_from_args(args) == 0
    out = capsys.readouterr().out
    report = tmp_path / "demo" / REPORT_NAME
    assert f"report          {report.resolve()}" in out
    text = report.read_text()
    assert _parse(text).sections == REQUIRED_SECTIONS
    # the sample's published description (samples/README.md): a simulated field with a spiral
    s = json.loads((tmp_path / "demo" / "summary.json").read_text())
    assert s["source"]["sha256"] == hashlib.sha256(demo.sample_path().read_bytes()).hexdigest()
    assert len(s["spiral_cores"]) >= 1
    assert np.isfinite(s["period_min"]["median"])


def test_demo_without_the_sample_says_how_to_get_it(monkeypatch):
    monkeypatch.setattr(demo, "SAMPLE_NAME", "no-such-sample.tif")
    with pytest.raises(InputError, match="source checkout"):
        demo.sample_path()


def test_report_of_a_field_without_waves(tmp_path, rng):
    # noise only: the analysis finds no waves (its warning), the report still has every section
    stack = tmp_path / "noise.tif"
    tifffile.imwrite(stack, rng.integers(90, 110, size=(60, 64, 64)).astype(np.uint8), imagej=True,
                     resolution=(1 / 20.0, 1 / 20.0), metadata={"axes": "TYX", "unit": "um", "finterval": 20.0})
    analyse_file(stack, out=tmp_path / "res")
    text = write_report(tmp_path / "res", stack_path=stack).read_text()
    assert _parse(text).sections == REQUIRED_SECTIONS
    assert "no waves detected" in text
    assert "there is no phase to show" in text
    assert "not measured" in text


def test_report_command_rewrites_a_folder(results, tmp_path, capsys):
    from waves.report import command

    stack, out = results
    copy = tmp_path / "c"
    shutil.copytree(out, copy, ignore=shutil.ignore_patterns("report.html", "movie.*"))
    parser = argparse.ArgumentParser()
    command.add_arguments(parser)
    args = parser.parse_args([str(copy), "--stack", str(stack), "--no-movie", "--quiet",
                              "--kymograph", "0", "500", "1800", "500"])
    assert command.run_from_args(args) == 0
    assert f"report          {(copy / REPORT_NAME).resolve()}" in capsys.readouterr().out
    text = (copy / REPORT_NAME).read_text()
    assert "line from (0.00, 0.50) mm to (1.80, 0.50) mm" in text
    assert not (copy / "movie.gif").exists()


def test_phase_pictures_of_a_frame_range_need_the_read_record(results, tmp_path):
    stack, _ = results
    out = tmp_path / "part"
    analyse_file(stack, out=out, frames=slice(10, 140))
    s = json.loads((out / "summary.json").read_text())
    # analyse_file records how the stack was read, so the pictures use the same frames
    assert s["analysis"]["read"]["frames"] == [10, 140, None]
    text = write_report(out, stack_path=stack, movie=False).read_text()
    assert "phase pictures not made" not in text and 'alt="phase snapshot"' in text
    # an older folder without the record: refused, with the reason in the report
    del s["analysis"]["read"]
    (out / "summary.json").write_text(json.dumps(s))
    text = write_report(out, stack_path=stack, movie=False).read_text()
    assert "give the stack (and frame range) that was analysed" in text


def test_model_comparison_section_shows_waves_compare_output(results, tmp_path):
    # `waves compare` (barkley) on the synthetic results, then the report shows its fit and checks
    from waves.cli import build_parser
    from waves.compare import run_from_args

    stack, out = results
    folder = tmp_path / "cmp"
    shutil.copytree(out, folder)
    args = build_parser().parse_args(["compare", str(folder), "--model", "barkley", "--quiet"])
    assert run_from_args(args) == 0
    comp = json.loads((folder / "compare_barkley.json").read_text())
    text = write_report(folder, stack_path=stack, movie=False).read_text()
    section = text[text.index('id="model"'):text.index('id="maps"')]
    assert 'alt="barkley dispersion"' in section
    for name in comp["fit"]["values"]:
        assert name in section
    assert len(re.findall(r"<tr>", section)) >= len(comp["checks"]) + len(comp["fit"]["values"])
