"""`waves screen` options through `waves.cli.main([...])`: --holm all, --metrics and
--no-retry, on small synthetic stacks (waves.synthetic) analysed on an in-process
dask cluster (`--scheduler`), so that a stack's analysis can be watched.

Truths: scipy.stats.mannwhitneyu on the numbers of the written table (reference
library), Holm's step-down adjustment computed here by hand from its definition
(Holm 1979; from memory), the metric names given on the command line, and counts of
the analyses actually run."""

from __future__ import annotations

import csv
import json

import numpy as np
import pytest
import tifffile
from scipy import stats as sps

from waves import screen
from waves import synthetic as S
from waves.cli import main
from waves.render import DarkfieldStyle

# group -> period (min) of its target waves; b is a replicate of the reference a,
# c is slower.  Four stacks each, sources placed at random.
GROUPS = {"a": 6.0, "b": 6.0, "c": 7.0}
PER_GROUP = 4
METRICS = ("period_min_median", "wavelength_um_median", "front_speed_um_per_min_median")


@pytest.fixture(scope="module")
def scheduler():
    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=1, threads_per_worker=2, processes=False, memory_limit="2GB",
                           dashboard_address=None)
    client = Client(cluster)
    yield cluster.scheduler_address
    client.close()
    cluster.close()


def _write(path, data):
    tifffile.imwrite(path, data, imagej=True, resolution=(0.1, 0.1),
                     metadata={"axes": "TYX", "unit": "um", "finterval": 20.0})


@pytest.fixture(scope="module")
def sheet(tmp_path_factory):
    folder = tmp_path_factory.mktemp("screen_options")
    rng = np.random.default_rng(20261202)
    rows = []
    for group, period in GROUPS.items():
        for i in range(PER_GROUP):
            x, y = rng.uniform(250.0, 550.0, size=2)
            movie = S.synthetic_movie((100, 80, 80), pixel_size_um=10.0, frame_interval_s=20.0,
                                      speed_um_per_min=100.0, sources=[S.TargetSource(x, y, period)],
                                      style=DarkfieldStyle(noise=0.03), seed=int(rng.integers(1 << 30)))
            name = f"{group}{i}.tif"
            _write(folder / name, movie.data)
            rows.append((name, group))
    path = folder / "sheet.csv"
    path.write_text("path,group\n" + "".join(f"{n},{g}\n" for n, g in rows))
    return path


def _screen(sheet, out, scheduler, *options) -> int:
    return main(["screen", str(sheet), "--out", str(out), "--scheduler", scheduler, "--quiet",
                 "--bootstrap", "200", *options])


def _read_csv(path) -> list[dict]:
    with open(path, newline="") as fh:
        return list(csv.DictReader(fh))


def _holm(p: list[float]) -> list[float]:
    """Holm's step-down adjustment, from its definition: sort ascending, multiply the
    i-th smallest (i from 0) by m - i, carry the running maximum, cap at 1."""
    order = sorted(range(len(p)), key=lambda i: p[i])
    out, running = [0.0] * len(p), 0.0
    for rank, i in enumerate(order):
        running = max(running, min(1.0, (len(p) - rank) * p[i]))
        out[i] = running
    return out


def test_holm_all_and_metrics(sheet, scheduler, tmp_path):
    out = tmp_path / "out"
    assert _screen(sheet, out, scheduler, "--metrics", *METRICS, "--holm", "all") == screen.EXIT_OK
    table = _read_csv(out / "screen_table.csv")
    assert len(table) == len(GROUPS) * PER_GROUP and {r["status"] for r in table} == {"ok"}
    st_all = _read_csv(out / "statistics.csv")
    # --metrics: the statistics, plots and provenance hold exactly the metrics asked for
    assert {(r["metric"], r["group"]) for r in st_all} == {(m, g) for m in METRICS for g in ("b", "c")}
    meta = json.loads((out / "screen.json").read_text())
    assert meta["metrics"] == list(METRICS) and meta["statistics"]["holm_family"] == "all"
    assert sorted(f for f in meta["files"] if f.startswith("plots/")) == sorted(f"plots/{m}.png" for m in METRICS)
    # p-values: scipy on the table's own numbers (reference library)
    for r in st_all:
        x = [float(t[r["metric"]]) for t in table if t["group"] == r["group"]]
        y = [float(t[r["metric"]]) for t in table if t["group"] == "a"]
        assert float(r["p_value"]) == pytest.approx(sps.mannwhitneyu(x, y, alternative="two-sided").pvalue,
                                                    rel=1e-12)
    # the slower group is told apart on period and wavelength (4 vs 4 separated: exact
    # p = 2 / C(8, 4) = 0.0286; scipy above checks it)
    p = {(r["metric"], r["group"]): float(r["p_value"]) for r in st_all}
    assert p[("period_min_median", "c")] < 0.05 and p[("wavelength_um_median", "c")] < 0.05
    # --holm all: one family of all six tests, by hand
    pv = [float(r["p_value"]) for r in st_all]
    assert [float(r["p_holm"]) for r in st_all] == pytest.approx(_holm(pv), rel=1e-12)

    # the same screen with the default family: every stack reused, Holm within each metric
    assert _screen(sheet, out, scheduler, "--metrics", *METRICS) == screen.EXIT_OK
    assert json.loads((out / "screen.json").read_text())["counts"]["reused"] == len(table)
    st_metric = _read_csv(out / "statistics.csv")
    assert [float(r["p_value"]) for r in st_metric] == pv
    for m in METRICS:
        rows = [r for r in st_metric if r["metric"] == m]
        assert [float(r["p_holm"]) for r in rows] == pytest.approx(_holm([float(r["p_value"]) for r in rows]),
                                                                 rel=1e-12)
    # the two families differ where it matters: the smallest p-value is multiplied by 6, not 2
    assert [float(r["p_holm"]) for r in st_metric] != [float(r["p_holm"]) for r in st_all]

    # without --metrics the default metrics are compared
    assert _screen(sheet, out, scheduler) == screen.EXIT_OK
    st_default = _read_csv(out / "statistics.csv")
    assert [r["metric"] for r in st_default if r["group"] == "b"] == list(screen.DEFAULT_METRICS)


def test_no_retry_keeps_a_failure_without_analysing_it_again(sheet, scheduler, tmp_path, monkeypatch):
    import waves.result

    calls: list[str] = []
    analyse_file = waves.result.analyse_file

    def counting(path, **kwargs):
        calls.append(str(path).rsplit("/", 1)[-1])
        return analyse_file(path, **kwargs)

    monkeypatch.setattr(waves.result, "analyse_file", counting)  # the workers run in this process
    folder = tmp_path
    # a flat stack: read fine, refused by the analysis (there are no waves to measure)
    _write(folder / "flat.tif", np.full((100, 80, 80), 100, np.uint8))
    good = sheet.parent / "a0.tif"
    rows = f"path,group\n{good},a\nflat.tif,a\n"
    (folder / "s.csv").write_text(rows)
    out = folder / "out"
    assert _screen(folder / "s.csv", out, scheduler) == screen.EXIT_SOME_FAILED
    assert sorted(calls) == ["a0.tif", "flat.tif"]  # each analysed once: no retry on the cluster
    (failed,) = [r for r in _read_csv(out / "screen_table.csv") if r["status"] != "ok"]
    assert failed["path"] == "flat.tif" and "flat" in failed["error"]
    error_json = out / "stacks" / failed["key"] / "error.json"
    first = error_json.stat().st_mtime_ns, error_json.read_bytes()

    # --no-retry: the failure is kept as recorded, not analysed again
    calls.clear()
    assert _screen(folder / "s.csv", out, scheduler, "--no-retry") == screen.EXIT_SOME_FAILED
    assert calls == []
    assert (error_json.stat().st_mtime_ns, error_json.read_bytes()) == first
    (again,) = [r for r in _read_csv(out / "screen_table.csv") if r["status"] != "ok"]
    assert again["error"] == failed["error"]
    meta = json.loads((out / "screen.json").read_text())
    assert meta["counts"] == {**meta["counts"], "analysed": 0, "reused": 1, "failed": 1}

    # without it the failed stack is analysed once more (and fails the same way)
    assert _screen(folder / "s.csv", out, scheduler) == screen.EXIT_SOME_FAILED
    assert calls == ["flat.tif"]
    assert error_json.stat().st_mtime_ns != first[0]
