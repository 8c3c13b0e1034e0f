"""Pictures and report of an analysis: figures (`waves.report.figures`), the
phase of a few frames recomputed for them (`waves.report.signal`), the movie
(`waves.report.movie`), the self-contained HTML report (`waves.report.html`)
and the `waves report` command (`waves.report.command`).

The names below are imported on first use, so that building the command
line does not import matplotlib; nothing here selects a matplotlib backend or
touches pyplot state.
"""

from __future__ import annotations

import importlib

__all__ = ["write_report", "REPORT_NAME", "write_movie", "MovieFiles", "recompute_phase", "PhaseFrames"]

_WHERE = {
    "write_report": "waves.report.html",
    "REPORT_NAME": "waves.report.html",
    "write_movie": "waves.report.movie",
    "MovieFiles": "waves.report.movie",
    "recompute_phase": "waves.report.signal",
    "PhaseFrames": "waves.report.signal",
}


def __getattr__(name: str):
    if name in _WHERE:
        return getattr(importlib.import_module(_WHERE[name]), name)
    raise AttributeError(f"module 'waves.report' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + list(_WHERE))
