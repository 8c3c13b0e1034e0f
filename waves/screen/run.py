"""Running a screen on a dask cluster: lock, hash cache, execution, statistics."""

from __future__ import annotations

import csv
import hashlib
import json
import logging
import os
import pathlib
import shutil
import socket
import time
import uuid
from dataclasses import replace

from waves import __version__, io
from waves.errors import InputError, WavesError
from waves.screen.common import (
    DEFAULT_METRICS,
    EXIT_OK,
    EXIT_SOME_FAILED,
    HASH_CACHE,
    LOCK_FILE,
    STACKS_FOLDER,
    STATS_CSV,
    STATS_JSON,
    metric_unit,
)
from waves.screen.results import ScreenResult, _cell, combined_table, metric_columns, write_table
from waves.screen.sheet import Sheet
from waves.screen.tasks import (
    _canonical_json,
    _stat_signature,
    analyse_task,
    analysis_spec,
    stack_key,
)

# --------------------------------------------------------------------------- run


class _Lock:
    """DIR/screen.lock holding host and pid; a lock left by a dead process
    on this host is taken over."""

    def __init__(self, out: pathlib.Path) -> None:
        self.path = out / LOCK_FILE
        self.held = False

    def __enter__(self) -> _Lock:
        me = {"host": socket.gethostname(), "pid": os.getpid()}
        for _ in range(2):
            try:
                fd = os.open(self.path, os.O_CREAT | os.O_EXCL | os.O_WRONLY)
            except FileExistsError:
                try:
                    other = json.loads(self.path.read_text())
                except (OSError, ValueError):
                    other = {}
                if other.get("host") == me["host"] and not _pid_alive(int(other.get("pid", -1))):
                    self.path.unlink(missing_ok=True)
                    continue
                raise InputError(
                    f"another screen run (host {other.get('host')}, pid {other.get('pid')}) is using "
                    f"{self.path.parent}; wait for it, or delete {self.path} if that run is gone"
                ) from None
            with os.fdopen(fd, "w") as fh:
                json.dump(me, fh)
            self.held = True
            return self
        raise InputError(f"cannot take the lock {self.path}; delete it if no screen run is using the folder")

    def __exit__(self, *exc) -> None:
        if self.held:
            self.path.unlink(missing_ok=True)


def _pid_alive(pid: int) -> bool:
    if pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _load_hash_cache(path: pathlib.Path) -> dict:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return data.get("files", {}) if isinstance(data, dict) else {}


def _save_hash_cache(path: pathlib.Path, cache: dict) -> None:
    io.write_json(path, {"note": "sha256 of screen inputs by path, [size, mtime_ns]", "files": cache})


def _local_cluster(n_workers: int | None, worker_memory_mb: float | None):
    from distributed import LocalCluster

    n = int(n_workers) if n_workers is not None else max(1, os.cpu_count() or 1)
    if n < 1:
        raise WavesError(f"--workers must be at least 1, got {n_workers!r}")
    memory = "auto" if worker_memory_mb is None else int(float(worker_memory_mb) * 2**20)
    # workers' own log lines (e.g. heartbeats failing while the cluster shuts
    # down) are silenced; a stack's failure reaches the table and the report
    return LocalCluster(n_workers=n, threads_per_worker=1, processes=True, memory_limit=memory,
                        dashboard_address=None, silence_logs=logging.CRITICAL)


def _worker_memory_bytes(client) -> list[int]:
    info = client.scheduler_info(n_workers=-1) if _accepts_n_workers(client) else client.scheduler_info()
    return [int(w.get("memory_limit") or 0) for w in info.get("workers", {}).values()]


def _accepts_n_workers(client) -> bool:
    import inspect

    return "n_workers" in inspect.signature(client.scheduler_info).parameters


def _check_memory(client, options) -> None:
    budget = options.memory_budget_mb * 2**20
    limits = [m for m in _worker_memory_bytes(client) if m > 0]
    # the analysis holds about two budgets at its peak (strip + outputs); common practice, no source
    if limits and 2 * budget > min(limits):
        raise WavesError(
            f"the analysis memory budget ({options.memory_budget_mb:g} MB per stack) does not fit a "
            f"worker's memory limit ({min(limits) / 2**20:.0f} MB); lower --memory-mb, give the "
            "workers more memory (--worker-memory-mb) or use fewer workers"
        )


def run_screen(
    sheet: Sheet,
    *,
    out,
    options=None,
    frames: slice | None = None,
    bin: int = 1,  # noqa: A002
    pixel_size_um: float | None = None,
    frame_interval_s: float | None = None,
    reference: str | None = None,
    metrics=None,
    client=None,
    scheduler: str | None = None,
    n_workers: int | None = None,
    worker_memory_mb: float | None = None,
    retry_failed: bool = True,
    n_boot: int = 2000,
    seed: int = 0,
    holm_family: str = "metric",
    progress: bool = True,
    report: bool = True,
) -> ScreenResult:
    """Analyse every stack of `sheet` on a dask cluster into `out`, then
    combine, compare the groups and write the table, statistics, plots and
    report.

    options: `waves.analyse.AnalysisOptions` shared by all rows; frames,
    bin: read selection for all rows; pixel_size_um (um), frame_interval_s
    (s): calibration for rows whose own cells are empty (a row's cells win,
    the file's calibration is used when both are absent).  reference: the
    group others are compared with (default: the sheet's first group).
    metrics: combined-table columns to compare (default `DEFAULT_METRICS`).
    client: a `distributed.Client` to use; else `scheduler` (address of a
    running scheduler); else a local cluster of `n_workers` (default one
    per core) single-threaded worker processes with `worker_memory_mb` each
    (default: the machine's memory shared equally).  retry_failed: analyse
    again stacks that failed in an earlier run.  n_boot, seed: bootstrap
    resamples and seed; holm_family: 'metric' or 'all' (`waves.stats`).
    Statistics run on replicate medians when any row has a replicate label
    (a row without one counts as a replicate of its own).

    The local cluster starts worker processes: a script that calls this
    must do so under `if __name__ == "__main__":`.
    """
    from waves import stats
    from waves.analyse import AnalysisOptions

    options = options if options is not None else AnalysisOptions()
    metrics = tuple(metrics) if metrics is not None else DEFAULT_METRICS
    unknown = [m for m in metrics if m not in metric_columns()]
    if unknown:
        raise WavesError(f"unknown metric(s) {', '.join(unknown)}; choose from {', '.join(metric_columns())}")
    groups = sheet.groups
    if reference is None:
        reference = groups[0] if groups else None
    elif reference not in groups:
        raise WavesError(
            f"reference group {reference!r} is not in the sheet; groups are {', '.join(groups)}: "
            "give one of them with --reference"
        )
    if holm_family not in stats.HOLM_FAMILIES:
        raise WavesError(f"holm family must be one of {stats.HOLM_FAMILIES}, got {holm_family!r}")
    out = pathlib.Path(os.fspath(out)).expanduser().resolve()
    if out.exists() and not out.is_dir():
        raise InputError(f"--out {out} exists and is not a folder; give a folder for the screen")
    stacks_dir = out / STACKS_FOLDER
    stacks_dir.mkdir(parents=True, exist_ok=True)
    started = time.time()
    with _Lock(out):
        for stale in stacks_dir.glob(".tmp-*"):  # left by a killed run
            shutil.rmtree(stale, ignore_errors=True)
        cache_path = out / HASH_CACHE
        cache = _load_hash_cache(cache_path)
        keys: dict[int, str | None] = {}
        messages: dict[int, str] = {}
        tasks: dict[str, dict] = {}  # task id -> task
        lines_of: dict[str, list[int]] = {}
        n_reused = 0
        for r in sheet.rows:
            if r.problem is not None:
                keys[r.line] = None
                messages[r.line] = r.problem
                continue
            spec = analysis_spec(
                options, frames=frames, bin=bin,
                pixel_size_um=r.pixel_size_um if r.pixel_size_um is not None else pixel_size_um,
                frame_interval_s=r.frame_interval_s if r.frame_interval_s is not None else frame_interval_s,
            )
            cached = cache.get(r.resolved)
            sha = None
            if cached is not None and cached.get("stat") == _stat_signature(r.resolved):
                sha = cached["sha256"]
                key = stack_key(sha, spec)
                if (stacks_dir / key / "summary.json").is_file():
                    keys[r.line] = key
                    n_reused += 1
                    continue
            tid = hashlib.sha256(_canonical_json([r.resolved, spec]).encode()).hexdigest()[:16]
            lines_of.setdefault(tid, []).append(r.line)
            tasks[tid] = {"path": r.resolved, "spec": spec, "stacks_dir": str(stacks_dir),
                          "retry_failed": bool(retry_failed), "sha256": sha, "threads": 1}
        records = _execute(tasks, client=client, scheduler=scheduler, n_workers=n_workers,
                           worker_memory_mb=worker_memory_mb, options=options, progress=progress,
                           cache=cache, cache_path=cache_path)
        n_done = 0
        for tid, rec in records.items():
            for line in lines_of[tid]:
                keys[line] = rec["key"]
                if rec["status"] in ("failed", "failed-kept"):
                    messages[line] = rec["message"] or "failed"
                elif rec["status"] == "reused":
                    n_reused += 1
                else:
                    n_done += 1
        _save_hash_cache(cache_path, cache)
        table = combined_table(sheet, keys, stacks_dir, messages)
        files = write_table(table, out)
        ok = [i for i, s in enumerate(table["status"]) if s == "ok"]
        comparisons: tuple = ()
        notes = []
        ok_groups = {table["group"][i] for i in ok}
        if reference is not None and reference in ok_groups and len(ok_groups) > 1:
            sub = {c: [table[c][i] for i in ok] for c in table}
            by_replicate = any(sub["replicate"])
            # a stack without a replicate label is a replicate of its own
            sub["replicate"] = [rep or f"line {line}" for rep, line in zip(sub["replicate"], sub["line"], strict=True)]
            comparisons = stats.compare_metrics(
                sub, metrics, reference=reference,
                replicate_column="replicate" if by_replicate else None,
                n_boot=n_boot, seed=seed, holm_family=holm_family,
            )
        else:
            notes.append("no statistics: the reference group and at least one other group need finished stacks")
        files += _write_statistics(comparisons, out)
        failures = tuple(
            (table["line"][i], table["path"][i], table["error"][i])
            for i, s in enumerate(table["status"]) if s != "ok"
        )
        exit_code = EXIT_OK if not failures else EXIT_SOME_FAILED
        result = ScreenResult(
            out=str(out), table=table, comparisons=comparisons, reference=reference, metrics=metrics,
            n_rows=len(sheet.rows), n_done=n_done, n_reused=n_reused, n_failed=len(failures),
            failures=failures, files=(), exit_code=exit_code,
        )
        provenance = {
            "schema_version": 1,
            "waves_version": __version__,
            "sheet": {"path": sheet.path, "sha256": sheet.sha256, "rows": len(sheet.rows)},
            "analysis": analysis_spec(options, frames=frames, bin=bin, pixel_size_um=pixel_size_um,
                                      frame_interval_s=frame_interval_s),
            "reference": reference,
            "metrics": list(metrics),
            "statistics": {"n_boot": n_boot, "seed": seed, "holm_family": holm_family,
                           "replicate_level": bool(any(table["replicate"]))},
            "started_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(started)),
            "wall_time_s": time.time() - started,
            "counts": {"rows": len(sheet.rows), "analysed": n_done, "reused": n_reused,
                       "failed": len(failures)},
            "cluster": _cluster_note(client, scheduler, n_workers),
            "notes": notes,
            "disclaimer": "research measurements; not a clinical, diagnostic or safety judgement",
        }
        if report:
            from waves import screen_report

            files += screen_report.write_screen_report(result, out, provenance=provenance)
        io.write_json(out / "screen.json", {**provenance, "files": files})
        files.append("screen.json")
    return replace(result, files=tuple(files))


def _cluster_note(client, scheduler, n_workers) -> str:
    if client is not None:
        return "given client"
    if scheduler is not None:
        return f"scheduler {scheduler}"
    return f"local cluster, {n_workers or os.cpu_count()} worker process(es)"


def _execute(tasks: dict, *, client, scheduler, n_workers, worker_memory_mb, options, progress,
             cache: dict, cache_path: pathlib.Path) -> dict:
    """Run the tasks on the cluster; returns task id -> record.  Records
    the input hashes in `cache` as results arrive (saved every 25)."""
    if not tasks:
        return {}
    from distributed import Client, as_completed
    from tqdm.auto import tqdm

    own_cluster = own_client = None
    try:
        if client is None:
            if scheduler is not None:
                try:
                    own_client = client = Client(scheduler, timeout="20s")
                except (OSError, TimeoutError) as exc:
                    raise WavesError(
                        f"cannot reach the dask scheduler at {scheduler}: {exc}; check the address "
                        "(tcp://HOST:PORT) and that the scheduler is running"
                    ) from None
            else:
                own_cluster = _local_cluster(n_workers, worker_memory_mb)
                own_client = client = Client(own_cluster)
        _check_memory(client, options)
        ids = list(tasks)
        run_id = uuid.uuid4().hex[:8]  # a new key each run: never a result the cluster still holds
        futures = client.map(analyse_task, [tasks[i] for i in ids],
                             key=[f"waves-screen-{i}-{run_id}" for i in ids], pure=False, retries=0)
        by_key = {f.key: i for f, i in zip(futures, ids, strict=True)}
        records: dict = {}
        bar = tqdm(total=len(futures), desc="stacks", unit="stack", disable=not progress)
        try:
            for fut in as_completed(futures):
                tid = by_key[fut.key]
                try:
                    rec = fut.result()
                except Exception as exc:  # the worker died (memory?) or the task could not run
                    rec = {"key": None, "path": tasks[tid]["path"], "sha256": None, "stat": None,
                           "status": "failed", "seconds": 0.0,
                           "message": f"the task failed on the cluster ({type(exc).__name__}: "
                                      f"{' '.join(str(exc).split())}); a worker that dies is often "
                                      "out of memory: lower --memory-mb or give workers more memory"}
                records[tid] = rec
                if rec.get("sha256") and rec.get("stat"):
                    cache[rec["path"]] = {"stat": rec["stat"], "sha256": rec["sha256"]}
                if len(records) % 25 == 0:
                    _save_hash_cache(cache_path, cache)
                bar.update(1)
        except BaseException:
            client.cancel(futures)
            raise
        finally:
            bar.close()
        return records
    finally:
        if own_client is not None:
            own_client.close()
        if own_cluster is not None:
            own_cluster.close()


def _write_statistics(comparisons, out: pathlib.Path) -> list[str]:
    cols = ["metric", "unit", "group", "reference", "level", "n", "n_reference", "median",
            "median_reference", "difference", "ci_low", "ci_high", "ci_level", "u_statistic",
            "p_value", "p_holm", "cliffs_delta", "test_method"]
    rows = [{**c.as_row(), "unit": metric_unit(c.metric)} for c in comparisons]
    with io.atomic_output(out / STATS_CSV, "w") as fh:
        w = csv.writer(fh, lineterminator="\n")
        w.writerow(cols)
        for r in rows:
            w.writerow([_cell(r[c]) for c in cols])
    io.write_json(out / STATS_JSON, {
        "note": "p-values are descriptive numbers for a research screen, not a clinical, "
                "diagnostic or regulatory judgement",
        "comparisons": rows,
    })
    return [STATS_CSV, STATS_JSON]
