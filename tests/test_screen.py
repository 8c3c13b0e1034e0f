"""Screens on a real local dask cluster (two worker processes, started once
for the module): simulated relay-model stacks of two excitabilities, a
screen killed midway and resumed, corrupt and missing files, the sheet, keys
and the command line.

Truths: the simulator's threshold-crossing period (sidecar) and its clean-
field analysis for the direction of period and speed; scipy.stats for the
statistics recomputed from the written table; the stacks' own summary.json
for the combined table; file modification times for "not redone"."""

from __future__ import annotations

import argparse
import csv
import json
import os
import pathlib
import signal
import subprocess
import sys
import time

import numpy as np
import pytest
from scipy import stats as sps

import waves
from waves import io, screen
from waves.analyse import AnalysisOptions
from waves.errors import InputError, WavesError
from waves.simulate import simulate

# ke (cAMP degradation, /min): 9 is more excitable than 14 (closer to the
# oscillatory regime; REFERENCES.md: ke = 10 excitable, lower ke oscillates)
GROUPS = {"ke9": (9.0, (0, 1, 2, 3, 4)), "ke14": (14.0, (10, 11, 12, 13, 14)),
          "ke9_again": (9.0, (20, 21, 22, 23, 24))}
N_STACKS = sum(len(s) for _, s in GROUPS.values())


def _make_stack(path: pathlib.Path, ke: float, seed: int, truth_analysis: bool) -> dict:
    rng = np.random.default_rng(seed)
    centre = (3200.0 + rng.uniform(-400, 400), 3200.0 + rng.uniform(-400, 400))
    run = simulate("relay", out=path, size=(64, 64), pixel_size_um=100.0, minutes=50.0,
                   frame_interval_s=30.0, seed=seed, params={"ke_per_min": ke}, center_um=centre,
                   noise=0.05, render="darkfield", progress=False, truth_analysis=truth_analysis)
    return run.truth


@pytest.fixture(scope="module")
def client():
    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, memory_limit="3GB",
                           dashboard_address=None)
    c = Client(cluster)
    yield c
    c.close()
    cluster.close()


@pytest.fixture(scope="module")
def stacks(tmp_path_factory):
    folder = tmp_path_factory.mktemp("screen_stacks")
    (folder / "movies").mkdir()
    rows, truths = [], {}
    for group, (ke, seeds) in GROUPS.items():
        for i, seed in enumerate(seeds):
            name = f"movies/{group}_{seed}.tif"
            truths[name] = _make_stack(folder / name, ke, seed, truth_analysis=(i == 0 and group != "ke9_again"))
            rows.append((name, group, f"r{i // 2 + 1}"))
    sheet = folder / "sheet.csv"
    with open(sheet, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["path", "group", "date", "note"])
        for name, group, _ in rows:
            w.writerow([name, group, "2026-12-01", f"seed of {name}"])
    return {"folder": folder, "sheet": sheet, "rows": rows, "truths": truths}


def _summaries(stacks_dir: pathlib.Path) -> dict:
    """Finished stacks: a killed task can leave a hidden .tmp-* folder whose summary.json
    was written but never renamed into place; that is not a finished result."""
    return {p.parent.name: p.stat().st_mtime_ns for p in stacks_dir.glob("*/summary.json")
            if not p.parent.name.startswith(".tmp-")}


@pytest.fixture(scope="module")
def screened(stacks, client):
    """A screen killed after its first finished stack, then rerun to the end."""
    out = stacks["folder"] / "out"
    env = dict(os.environ, PYTHONPATH=str(pathlib.Path(waves.__file__).resolve().parents[1]))
    proc = subprocess.Popen(
        [sys.executable, "-m", "waves.screen", str(stacks["sheet"]), "--out", str(out), "--workers", "1",
         "--quiet"], env=env, start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
    )
    deadline = time.monotonic() + 120
    try:
        while not _summaries(out / "stacks") and time.monotonic() < deadline and proc.poll() is None:
            time.sleep(0.05)
    finally:
        os.killpg(proc.pid, signal.SIGKILL)  # the client and its worker processes
        proc.wait(timeout=30)
    before = _summaries(out / "stacks")
    lock_left = (out / "screen.lock").exists()
    result = screen.run_screen(screen.read_sheet(stacks["sheet"]), out=out, client=client,
                               reference="ke9", progress=False, seed=1)
    return {"out": out, "before": before, "result": result, "lock_left": lock_left}


def _row(result, group):
    return {c.metric: c for c in result.comparisons if c.group == group}


@pytest.mark.slow
def test_killed_screen_resumes_without_redoing_finished_stacks(screened):
    before, result, out = screened["before"], screened["result"], screened["out"]
    assert 1 <= len(before) < N_STACKS, "the kill must land midway for this test to mean anything"
    after = _summaries(out / "stacks")
    assert len(after) == N_STACKS
    for key, mtime in before.items():  # untouched: same file, same modification time
        assert after[key] == mtime
    assert result.n_reused == len(before)
    assert result.n_done == N_STACKS - len(before)
    assert result.exit_code == screen.EXIT_OK and result.n_failed == 0
    assert not list((out / "stacks").glob(".tmp-*"))
    assert screened["lock_left"]  # the killed run's lock was taken over (its pid is dead)
    assert not (out / "screen.lock").exists()


@pytest.mark.slow
def test_rerun_of_a_finished_screen_submits_nothing(stacks, screened):
    # the input-hash cache knows every file: no task is submitted, so a
    # client that cannot do anything is never touched
    res = screen.run_screen(screen.read_sheet(stacks["sheet"]), out=screened["out"], client=object(),
                            reference="ke9", progress=False, seed=1)
    assert res.n_reused == N_STACKS and res.n_done == 0 and res.exit_code == screen.EXIT_OK
    # the same comparisons as the run that analysed them (same data, same seed)
    assert [c.as_row() for c in res.comparisons] == [c.as_row() for c in screened["result"].comparisons]


@pytest.mark.slow
def test_screen_finds_the_excitability_difference_in_the_right_direction(stacks, screened):
    truths = stacks["truths"]
    # simulator truth: threshold-crossing period on the clean field (sidecar)
    truth_period = {g: np.median([truths[n]["period_min"]["median"] for n, gg, _ in stacks["rows"] if gg == g])
                    for g in GROUPS}
    assert truth_period["ke14"] > 1.03 * truth_period["ke9"]
    # clean-field analysis of the first stack of each group: slower fronts at higher ke
    # (less excitable media conduct more slowly; from memory, Keener & Sneyd)
    assert (truths["movies/ke14_10.tif"]["analysis"]["front_speed_um_per_min"]["median"]
            < truths["movies/ke9_0.tif"]["analysis"]["front_speed_um_per_min"]["median"])
    res = screened["result"]
    c = _row(res, "ke14")
    period, speed = c["period_min_median"], c["front_speed_um_per_min_median"]
    assert period.difference > 0 and period.ci_low > 0
    assert period.cliffs_delta == 1.0 and period.p_holm < 0.05
    assert speed.difference < 0 and speed.ci_high < 0
    assert speed.cliffs_delta == -1.0 and speed.p_holm < 0.05
    # the measured period tracks the simulator's within a few percent
    assert period.median_reference == pytest.approx(truth_period["ke9"], rel=0.06)
    assert period.median == pytest.approx(truth_period["ke14"], rel=0.06)


@pytest.mark.slow
def test_same_parameters_show_no_significant_difference(screened):
    c = _row(screened["result"], "ke9_again")
    for metric in ("period_min_median", "front_speed_um_per_min_median", "wavelength_um_median"):
        assert c[metric].p_holm > 0.05
        assert abs(c[metric].difference) < 0.03 * c[metric].median_reference
        assert abs(c[metric].cliffs_delta) < 1.0


@pytest.mark.slow
def test_table_holds_every_stack_summary_and_statistics_match_scipy(stacks, screened):
    out = screened["out"]
    with open(out / "screen_table.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert len(rows) == N_STACKS
    for col in screen.metric_columns() + ("note", "date", "key", "pixel_size_um"):
        assert col in rows[0]
    for r in rows:  # against each stack's own summary.json, read here
        s = json.loads((out / r["result_dir"] / "summary.json").read_text())
        assert float(r["period_min_median"]) == s["period_min"]["median"]
        assert float(r["front_speed_um_per_min_median"]) == s["front_speed_um_per_min"]["median"]
        assert int(r["n_spiral_cores"]) == len(s["spiral_cores"])
        assert float(r["pixel_size_um"]) == 100.0 and float(r["frame_interval_s"]) == 30.0
        assert r["note"] == f"seed of {r['path']}"
    with open(out / "statistics.csv", newline="") as fh:
        st = list(csv.DictReader(fh))
    for metric in ("period_min_median", "front_speed_um_per_min_median"):
        x = [float(r[metric]) for r in rows if r["group"] == "ke14"]
        y = [float(r[metric]) for r in rows if r["group"] == "ke9"]
        (line,) = [s for s in st if s["metric"] == metric and s["group"] == "ke14"]
        ref = sps.mannwhitneyu(x, y, alternative="two-sided")  # reference library
        assert float(line["p_value"]) == pytest.approx(ref.pvalue, rel=1e-9)
        assert float(line["difference"]) == pytest.approx(np.median(x) - np.median(y), rel=1e-9)
        assert line["unit"] == ("min" if metric.startswith("period") else "um/min")
    report = (out / "report.html").read_text()
    assert "not a clinical, diagnostic or safety judgement" in report
    assert "regulatory" in report and report.count("data:image/png;base64,") == len(screen.DEFAULT_METRICS)
    assert (out / "plots" / "period_min_median.png").stat().st_size > 1000
    meta = json.loads((out / "screen.json").read_text())
    assert meta["counts"]["rows"] == N_STACKS and meta["sheet"]["sha256"] == io.file_sha256(stacks["sheet"])


@pytest.mark.slow
def test_parquet_table_equals_the_csv_table(screened):
    pq = pytest.importorskip("pyarrow.parquet")  # optional: Parquet only when pyarrow is installed
    out = screened["out"]
    table = pq.read_table(out / "screen_table.parquet").to_pydict()
    with open(out / "screen_table.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert list(table) == list(rows[0])
    assert table["path"] == [r["path"] for r in rows]
    assert table["period_min_median"] == [float(r["period_min_median"]) for r in rows]
    assert table["n_frames"] == [int(r["n_frames"]) for r in rows]


@pytest.mark.slow
def test_command_line_on_a_scheduler_with_replicates(stacks, screened, client, tmp_path):
    import shutil

    out = tmp_path / "rep"
    shutil.copytree(screened["out"] / "stacks", out / "stacks")  # finished results are reused
    sheet = stacks["folder"] / "sheet_replicates.csv"
    with open(sheet, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(["path", "group", "replicate"])
        for name, group, rep in stacks["rows"]:
            # the last ke9 stack has no label: it counts as a replicate of its own
            w.writerow([name, group, "" if name == "movies/ke9_4.tif" else rep])
    p = argparse.ArgumentParser()
    screen.add_arguments(p)
    args = p.parse_args([str(sheet), "--out", str(out), "--scheduler", client.scheduler.address,
                         "--reference", "ke9", "--quiet", "--bootstrap", "500"])
    assert screen.run_from_args(args) == screen.EXIT_OK
    with open(out / "screen_table.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    with open(out / "statistics.csv", newline="") as fh:
        st = [s for s in csv.DictReader(fh) if s["metric"] == "period_min_median" and s["group"] == "ke14"]
    # replicates r1 (2 stacks), r2 (2), r3 (1) per group: medians per replicate, by hand
    def rep_medians(group):
        vals = {}
        for r in rows:
            if r["group"] == group:
                vals.setdefault(r["replicate"] or r["line"], []).append(float(r["period_min_median"]))
        return [float(np.median(v)) for v in vals.values()]

    assert st[0]["level"] == "replicate" and int(st[0]["n"]) == 3 and int(st[0]["n_reference"]) == 3
    assert float(st[0]["median"]) == pytest.approx(np.median(rep_medians("ke14")))
    ref = sps.mannwhitneyu(rep_medians("ke14"), rep_medians("ke9"), alternative="two-sided")
    assert float(st[0]["p_value"]) == pytest.approx(ref.pvalue)
    meta = json.loads((out / "screen.json").read_text())
    assert meta["counts"]["reused"] == N_STACKS and meta["counts"]["analysed"] == 0


@pytest.mark.slow
def test_corrupt_and_missing_files_are_reported_while_the_others_finish(stacks, client, tmp_path):
    folder = tmp_path
    good = [stacks["folder"] / n for n, _, _ in stacks["rows"][:2]]
    rng = np.random.default_rng(7)
    corrupt = folder / "corrupt.tif"
    corrupt.write_bytes(b"II*\x00" + rng.integers(0, 256, 5000, dtype=np.uint8).tobytes())
    text = folder / "notes.tif"
    text.write_text("this is not an image\n")
    sheet = folder / "sheet.csv"
    sheet.write_text(
        "path,group,pixel_size_um\n"
        f"{good[0]},a,\n{good[1]},b,\ncorrupt.tif,a,\nnotes.tif,b,\nmissing.tif,a,\n{good[1]},b,-3\n"
    )
    res = screen.run_screen(screen.read_sheet(sheet), out=folder / "out", client=client, progress=False,
                            n_boot=200)
    assert res.exit_code == screen.EXIT_SOME_FAILED
    status = dict(zip(res.table["line"], res.table["status"], strict=True))
    assert status == {2: "ok", 3: "ok", 4: "failed", 5: "failed", 6: "failed", 7: "failed"}
    errors = dict(zip(res.table["line"], res.table["error"], strict=True))
    assert "corrupt.tif" in errors[4] or "TIFF" in errors[4] or "damaged" in errors[4].lower()
    assert "no such file" in errors[6] and "missing.tif" in errors[6]
    assert "pixel_size_um must be a positive number" in errors[7]
    keys = dict(zip(res.table["line"], res.table["key"], strict=True))
    err = json.loads((folder / "out" / "stacks" / keys[4] / "error.json").read_text())
    assert err["kind"] == "input" and err["message"] == errors[4]
    # a rerun that does not retry failures keeps them and reuses the rest
    again = screen.run_screen(screen.read_sheet(sheet), out=folder / "out", client=client, progress=False,
                              n_boot=200, retry_failed=False)
    assert again.n_done == 0 and again.n_reused == 2 and again.n_failed == 4
    assert dict(zip(again.table["line"], again.table["error"], strict=True))[4] == errors[4]
    html = (folder / "out" / "report.html").read_text()
    assert "missing.tif" in html and "corrupt.tif" in html


@pytest.mark.slow
def test_identical_stacks_share_one_result(stacks, client, tmp_path):
    import shutil

    src = stacks["folder"] / stacks["rows"][0][0]
    for name in ("copy1.tif", "copy2.tif"):
        shutil.copyfile(src, tmp_path / name)  # same bytes: same key, analysed at the same time
    sheet = tmp_path / "s.csv"
    sheet.write_text("path,group,replicate\ncopy1.tif,a,\ncopy2.tif,b,\n")
    res = screen.run_screen(screen.read_sheet(sheet), out=tmp_path / "out", client=client, progress=False,
                            n_boot=200)
    assert res.exit_code == screen.EXIT_OK and res.table["status"] == ["ok", "ok"]
    assert res.table["key"][0] == res.table["key"][1]
    # an empty replicate column keeps the statistics per stack
    assert {c.level for c in res.comparisons} == {"stack"}
    assert [p.name for p in (tmp_path / "out" / "stacks").iterdir()] == [res.table["key"][0]]


def test_sheet_validation(tmp_path, tiff_factory):
    tiff_factory("a.tif", np.zeros((8, 4, 4), np.uint8))
    (tmp_path / "sub").mkdir()
    s = tmp_path / "sub" / "s.csv"
    s.write_text("path,group\n")
    with pytest.raises(InputError, match="lists no stacks"):
        screen.read_sheet(s)
    s.write_text("path,strain\n../a.tif,wt\n")
    with pytest.raises(InputError, match="no 'group' column"):
        screen.read_sheet(s)
    s.write_text("path,group,group\n../a.tif,wt,wt\n")
    with pytest.raises(InputError, match="repeats"):
        screen.read_sheet(s)
    with pytest.raises(InputError, match="no such sheet"):
        screen.read_sheet(tmp_path / "none.csv")
    s.write_text("path,group,frame_interval_s,replicate,extra\n../a.tif,wt,20,1,x\n\n../a.tif,,abc,,\nnone.tif,mut,,,\n")
    sheet = screen.read_sheet(s)
    assert [r.line for r in sheet.rows] == [2, 4, 5]
    r0, r1, r2 = sheet.rows
    assert r0.resolved == str(tmp_path / "a.tif") and r0.frame_interval_s == 20.0 and r0.problem is None
    assert r0.extra == (("extra", "x"),) and r0.replicate == "1"
    assert "empty group" in r1.problem and "frame_interval_s must be a number" in r1.problem
    assert "no such file" in r2.problem
    assert sheet.groups == ("wt", "mut") and sheet.has_replicates


def test_key_depends_on_bytes_options_calibration_and_version():
    base = screen.analysis_spec(AnalysisOptions())
    k = screen.stack_key("ab" * 32, base)
    assert len(k) == 16 and int(k, 16) >= 0
    assert k == screen.stack_key("ab" * 32, screen.analysis_spec(AnalysisOptions(workers=1)))  # execution only
    others = {
        screen.stack_key("cd" * 32, base),
        screen.stack_key("ab" * 32, screen.analysis_spec(AnalysisOptions(period_band_min=(3.0, 20.0)))),
        screen.stack_key("ab" * 32, screen.analysis_spec(AnalysisOptions(), pixel_size_um=10.0)),
        screen.stack_key("ab" * 32, screen.analysis_spec(AnalysisOptions(), frames=slice(0, 50))),
        screen.stack_key("ab" * 32, screen.analysis_spec(AnalysisOptions(), bin=2)),
        screen.stack_key("ab" * 32, base, version="0.0.0"),
    }
    assert k not in others and len(others) == 6
    # the same selection written two ways is one key
    assert screen.analysis_spec(AnalysisOptions(), frames=slice(None, 50)) == screen.analysis_spec(
        AnalysisOptions(), frames=slice(0, 50))
    with pytest.raises(WavesError):
        screen.analysis_spec(AnalysisOptions(), bin=0)


def test_memory_budget_must_fit_the_workers(client, tmp_path, tiff_factory):
    tiff_factory("a.tif", np.zeros((8, 4, 4), np.uint8))
    sheet = tmp_path / "s.csv"
    sheet.write_text("path,group\na.tif,wt\n")
    with pytest.raises(WavesError, match="memory limit"):
        screen.run_screen(screen.read_sheet(sheet), out=tmp_path / "o", client=client, progress=False,
                          options=AnalysisOptions(memory_budget_mb=4000.0))
    with pytest.raises(WavesError, match="reference group 'x'"):
        screen.run_screen(screen.read_sheet(sheet), out=tmp_path / "o", client=client, reference="x")
    with pytest.raises(WavesError, match="unknown metric"):
        screen.run_screen(screen.read_sheet(sheet), out=tmp_path / "o", client=client, metrics=["zz"])


def test_command_line_exit_code_for_a_bad_sheet(tmp_path, capsys):
    sheet = tmp_path / "s.csv"
    sheet.write_text("file,group\na.tif,wt\n")
    assert screen.main([str(sheet), "--out", str(tmp_path / "o"), "--quiet"]) == screen.EXIT_USAGE
    assert "no 'path' column" in capsys.readouterr().err


def test_an_internal_error_is_recorded_with_its_type_and_traceback(tmp_path, tiff_factory):
    path = tiff_factory("a.tif", np.zeros((8, 4, 4), np.uint8))
    spec = screen.analysis_spec(AnalysisOptions())
    spec["options"]["no_such_option"] = 1  # AnalysisOptions(**...) raises TypeError: not a WavesError
    rec = screen.analyse_task({"path": str(path), "spec": spec, "stacks_dir": str(tmp_path / "stacks"),
                               "retry_failed": True, "sha256": None, "threads": 1})
    assert rec["status"] == "failed" and rec["message"].startswith("internal error TypeError")
    assert rec["sha256"] == io.file_sha256(path)
    err = json.loads((tmp_path / "stacks" / rec["key"] / "error.json").read_text())
    assert err["kind"] == "internal" and "Traceback" in err["traceback"]
    assert not list((tmp_path / "stacks").glob(".tmp-*"))
