"""Threshold crossings of recorded traces: the ground-truth period of a run.

Shared by the simulator (`waves.simulate`), the model predictions
(`waves.dispersion`) and the grid-resolution estimate
(`waves.models.resolution`); re-exported by `waves.simulate`.
"""

from __future__ import annotations

import math

import numpy as np

__all__ = ["upward_crossings", "period_from_crossings"]


def upward_crossings(trace: np.ndarray, times: np.ndarray, threshold: float,
                     previous: np.ndarray | None = None, previous_time: float | None = None):
    """Times of upward crossings of `threshold` per column of trace (nt, nprobe).

    Linear interpolation between samples.  `previous` (nprobe,) with
    `previous_time` is the sample before trace[0], so a trace may be fed in
    chunks.  Returns a list (one array per probe).
    """
    trace = np.asarray(trace, np.float64)
    times = np.asarray(times, np.float64)
    if previous is not None:
        trace = np.vstack([np.asarray(previous, np.float64)[None], trace])
        times = np.concatenate([[previous_time], times])
    out = []
    for k in range(trace.shape[1]):
        x = trace[:, k]
        below = x[:-1] < threshold
        above = x[1:] >= threshold
        idx = np.nonzero(below & above)[0]
        frac = (threshold - x[idx]) / (x[idx + 1] - x[idx])
        out.append(times[idx] + frac * (times[idx + 1] - times[idx]))
    return out


def period_from_crossings(crossing_times: np.ndarray, *, after: float = -math.inf,
                          min_intervals: int = 2) -> float | None:
    """Median interval between successive crossings later than `after`, or None."""
    t = np.asarray(crossing_times, np.float64)
    t = t[t > after]
    if t.size < min_intervals + 1:
        return None
    return float(np.median(np.diff(t)))
