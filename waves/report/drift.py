"""The stage-drift trace of an analysis (summary['drift'], drift.csv): one small
figure and its caption for the report."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from waves.report.figures import _figure


def _floats(col) -> np.ndarray:
    return np.asarray([float(x) if str(x) not in ("", "None", "nan") else np.nan for x in (col or [])],
                      dtype=np.float64)


def drift_trace_figure(table: Mapping | None, drift: Mapping | None):
    """Stage shift (recorded px) in x and y against time; dotted lines at jumps.
    None when the analysis holds no measured drift."""
    if not table or not drift or not drift.get("estimated"):
        return None
    t, dy, dx = (_floats(table.get(k)) for k in ("t_min", "dy_px", "dx_px"))
    if t.size == 0 or not (np.isfinite(dy).any() and np.isfinite(dx).any()):
        return None
    fig = _figure(6.0, 2.4)
    ax = fig.add_subplot()
    ax.plot(t, dx, color="#0072b2", lw=1.2, label="x")
    ax.plot(t, dy, color="#d55e00", lw=1.2, label="y")
    frames = _floats(table.get("frame"))
    for j in drift.get("jumps") or []:
        k = np.flatnonzero(frames == float(j["frame"]))
        if k.size:
            ax.axvline(t[k[0]], color="#444444", ls=":", lw=1.0)
    ax.axhline(0.0, color="#999999", lw=0.5)
    ax.set_xlabel("time (min)")
    ax.set_ylabel("stage shift (px)")
    ax.legend(loc="best", fontsize=8, frameon=False)
    return fig


def drift_caption(drift: Mapping) -> str:
    jumps = drift.get("jumps") or []
    text = (f"Stage drift measured on the movie: largest shift {drift['max_shift_px']:.2f} px of the "
            "recording from the first frame")
    if jumps:
        text += "; sudden jumps (dotted) at frame " + ", ".join(str(j["frame"]) for j in jumps)
    text += ". " + ("Frames were shifted back before the analysis; the border strip without data in "
                    "some frame is not measured." if drift.get("corrected") else
                    "Not corrected: " + str(drift.get("reason", "")) + ".")
    return text
