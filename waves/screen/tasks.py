"""Result keys and the task one worker runs for one stack."""

from __future__ import annotations

import hashlib
import json
import os
import pathlib
import shutil
import socket
import time
import traceback
import uuid

from waves import __version__, io
from waves.errors import WavesError

# --------------------------------------------------------------------------- keys and tasks


def _canonical_json(obj) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False)


def analysis_spec(
    options=None,
    *,
    frames: slice | None = None,
    bin: int = 1,  # noqa: A002 - the name users know from ImageJ
    pixel_size_um: float | None = None,
    frame_interval_s: float | None = None,
) -> dict:
    """Everything that decides a stack's result besides its bytes, as a
    JSON-able dict: analysis options (without the execution-only `workers`),
    frame range, binning and calibration overrides (um, s)."""
    from dataclasses import asdict

    from waves.analyse import AnalysisOptions

    options = options if options is not None else AnalysisOptions()
    opts = asdict(options)
    opts.pop("workers", None)
    opts["period_band_min"] = list(options.period_band_min)
    if frames is not None and not isinstance(frames, slice):
        raise WavesError(f"frames must be a slice (START:STOP), got {frames!r}")
    if int(bin) != bin or int(bin) < 1:
        raise WavesError(f"bin must be a whole number >= 1, got {bin!r}")
    return {
        "options": opts,
        "frames": None if frames is None else [frames.start or 0, frames.stop, frames.step],
        "bin": int(bin),
        "pixel_size_um": None if pixel_size_um is None else float(pixel_size_um),
        "frame_interval_s": None if frame_interval_s is None else float(frame_interval_s),
    }


def stack_key(input_sha256: str, spec: dict, *, version: str = __version__) -> str:
    """Result key of a stack: the first 16 hex digits of the sha256 of the
    canonical JSON of {input sha256, analysis spec, waves version}."""
    text = _canonical_json({"input_sha256": input_sha256, "analysis": spec, "waves_version": version})
    return hashlib.sha256(text.encode("ascii")).hexdigest()[:16]


def _stat_signature(path: str) -> list | None:
    """[size, mtime_ns] of a regular file (the hash cache's check); None
    for folders and patterns, which are hashed every run."""
    try:
        st = os.stat(path)
    except OSError:
        return None
    if not pathlib.Path(path).is_file():
        return None
    return [int(st.st_size), int(st.st_mtime_ns)]


def _options_from_spec(spec: dict, workers: int):
    from waves.analyse import AnalysisOptions

    opts = dict(spec["options"])
    opts["period_band_min"] = tuple(opts["period_band_min"])
    return AnalysisOptions(**opts, workers=workers)


def _error_record(exc: BaseException) -> dict:
    if isinstance(exc, WavesError):
        return {"kind": "input", "error_type": type(exc).__name__, "message": " ".join(str(exc).split())}
    return {
        "kind": "internal",
        "error_type": type(exc).__name__,
        "message": f"internal error {type(exc).__name__}: {' '.join(str(exc).split())}",
        "traceback": traceback.format_exc(),
    }


def analyse_task(task: dict) -> dict:
    """Analyse one stack into DIR/stacks/<key>/ and return a small record.

    Runs on a dask worker.  task: {path, spec, stacks_dir, retry_failed,
    sha256 (or None: computed here), threads}.  Returns {key, path, sha256,
    stat, status, message, seconds}; status 'done' (analysed now), 'reused'
    (a finished result existed), 'failed' (error.json written) or
    'failed-kept' (an earlier failure, not retried).  Never raises for a
    problem of the stack itself.
    """
    t0 = time.perf_counter()
    path = task["path"]
    stacks_dir = pathlib.Path(task["stacks_dir"])
    record = {"key": None, "path": path, "sha256": task.get("sha256"), "stat": _stat_signature(path),
              "status": "failed", "message": None, "seconds": 0.0}
    try:
        sha = record["sha256"] or io.file_sha256(path)
    except (WavesError, OSError) as exc:
        record["message"] = f"cannot read {path}: {' '.join(str(exc).split())}"
        record["seconds"] = time.perf_counter() - t0
        return record
    record["sha256"] = sha
    key = stack_key(sha, task["spec"])
    record["key"] = key
    folder = stacks_dir / key
    if (folder / "summary.json").is_file():
        record.update(status="reused", seconds=time.perf_counter() - t0)
        return record
    if (folder / "error.json").is_file() and not task.get("retry_failed", True):
        try:
            record["message"] = json.loads((folder / "error.json").read_text())["message"]
        except (OSError, ValueError, KeyError):
            record["message"] = "an earlier run failed on this stack (error.json unreadable)"
        record.update(status="failed-kept", seconds=time.perf_counter() - t0)
        return record
    threads = max(1, int(task.get("threads", 1)))
    _limit_threads(threads)
    tmp = stacks_dir / f".tmp-{key}-{uuid.uuid4().hex[:8]}"
    spec = task["spec"]
    try:
        from waves.result import analyse_file

        frames = None if spec["frames"] is None else slice(*spec["frames"])
        analyse_file(
            path,
            out=tmp,
            options=_options_from_spec(spec, threads),
            frames=frames,
            bin=spec["bin"],
            pixel_size_um=spec["pixel_size_um"],
            frame_interval_s=spec["frame_interval_s"],
            progress=False,
        )
        seconds = time.perf_counter() - t0
        io.write_json(tmp / "screen_record.json", {
            "key": key, "input_path": path, "input_sha256": sha, "analysis": spec,
            "waves_version": __version__, "seconds": seconds, "host": socket.gethostname(),
            "finished_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
        })
        _publish(tmp, folder)
        record.update(status="done", seconds=seconds)
    except Exception as exc:  # a stack's failure is recorded; the screen goes on
        shutil.rmtree(tmp, ignore_errors=True)
        if (folder / "summary.json").is_file():  # an identical stack finished meanwhile
            record.update(status="reused", seconds=time.perf_counter() - t0)
            return record
        err = _error_record(exc)
        folder.mkdir(parents=True, exist_ok=True)
        io.write_json(folder / "error.json", {"key": key, "input_path": path, "input_sha256": sha,
                                             "analysis": spec, "waves_version": __version__, **err})
        record.update(status="failed", message=err["message"], seconds=time.perf_counter() - t0)
    return record


def _publish(tmp: pathlib.Path, folder: pathlib.Path) -> None:
    """Rename a finished temporary result folder to its key folder.  An
    earlier failure there is replaced; a result that another task (same
    bytes, same options) published meanwhile is kept and `tmp` dropped."""
    if (folder / "summary.json").is_file():
        shutil.rmtree(tmp, ignore_errors=True)
        return
    if folder.exists():  # an earlier failure: error.json only
        shutil.rmtree(folder)
    try:
        os.replace(tmp, folder)
    except OSError:
        if not (folder / "summary.json").is_file():
            raise
        shutil.rmtree(tmp, ignore_errors=True)


def _limit_threads(threads: int) -> None:
    """Keep a task's compiled kernels to its share of the cores."""
    try:
        import numba

        numba.set_num_threads(min(threads, numba.config.NUMBA_NUM_THREADS))
    except (ImportError, ValueError):  # pragma: no cover - numba is a dependency
        pass
