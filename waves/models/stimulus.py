"""Initial conditions and stimuli: rest, random, broken wave (spiral), point
stimulus (target), and periodic pacing of small discs (pacemakers).

Positions here are in pixels of the simulation grid (row, col); the public API
(`waves.simulate`) takes micrometres and converts.

Rotation sense (DESIGN.md): 'clockwise' / 'counterclockwise' as seen on the
displayed image, row 0 at the top.  The broken wave is a vertical excited
strip ending at the core, with a refractory strip on one side: the front moves
away from the refractory side and curls around its free end.  Strip above the
core moving left (-x) turns counterclockwise as displayed; its mirror image
turns clockwise.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from waves.errors import WavesError

__all__ = [
    "INITIAL_CONDITIONS",
    "ROTATIONS",
    "disc",
    "initial_state",
    "Pacemaker",
    "random_pacemakers",
]

INITIAL_CONDITIONS = ("spiral", "target", "pacing", "rest", "random")
ROTATIONS = ("counterclockwise", "clockwise")

# widths of the broken-wave strips, model length units
_EXCITED_WIDTH = 3.0
_REFRACTORY_WIDTH = 6.0
# radius of point stimuli and pacemaker discs, model length units
STIMULUS_RADIUS = 2.0


def disc(shape_yx, center_yx, radius_px: float) -> np.ndarray:
    """bool (rows, cols): pixels whose centre lies within radius_px of center_yx."""
    ny, nx = shape_yx
    yy = np.arange(ny)[:, None] - float(center_yx[0])
    xx = np.arange(nx)[None, :] - float(center_yx[1])
    inside = yy * yy + xx * xx <= float(radius_px) ** 2
    if not inside.any():  # a disc smaller than a pixel still hits the nearest pixel
        i = int(np.clip(round(center_yx[0]), 0, ny - 1))
        j = int(np.clip(round(center_yx[1]), 0, nx - 1))
        inside[i, j] = True
    return inside


def _fill(state: np.ndarray, where: np.ndarray, values) -> None:
    for k, val in enumerate(values):
        state[k][where] = np.float32(val)


def initial_state(
    spec,
    params: dict,
    shape_yx,
    *,
    spacing: float,
    kind: str = "spiral",
    rotation: str = "counterclockwise",
    center_yx=None,
    rng: np.random.Generator | None = None,
) -> np.ndarray:
    """float32 state (nvar, rows, cols) for initial condition `kind`.

    'rest', 'random' (uniform between rest and excited / refractory values,
    per pixel, from `rng`), 'spiral' (broken wave with its free end at
    center_yx, rotating as `rotation` says), 'target' (excited disc at
    center_yx), 'pacing' (rest; the pacemaker does the rest).  center_yx
    defaults to the grid centre; spacing is h in model length units.
    """
    if kind not in INITIAL_CONDITIONS:
        raise WavesError(
            f"unknown initial condition {kind!r}; use one of {', '.join(INITIAL_CONDITIONS)}"
        )
    if rotation not in ROTATIONS:
        raise WavesError(f"unknown rotation {rotation!r}; use one of {', '.join(ROTATIONS)}")
    ny, nx = shape_yx
    nvar = len(spec.variables)
    rest = spec.rest(params)
    state = np.empty((nvar, ny, nx), np.float32)
    for k in range(nvar):
        state[k] = np.float32(rest[k])
    if center_yx is None:
        center_yx = ((ny - 1) / 2.0, (nx - 1) / 2.0)
    cy, cx = float(center_yx[0]), float(center_yx[1])
    if kind == "random":
        if rng is None:
            raise WavesError("a random initial condition needs a seeded generator")
        exc, ref = spec.excited(params), spec.refractory(params)
        for k in range(nvar):
            hi = exc[k] if k == 0 else ref[k]
            state[k] = (rest[k] + (hi - rest[k]) * rng.random((ny, nx))).astype(np.float32)
    elif kind == "spiral":
        w_ex = max(2, int(round(_EXCITED_WIDTH / spacing)))
        w_ref = max(2, int(round(_REFRACTORY_WIDTH / spacing)))
        rows = np.arange(ny)[:, None] < cy
        cols = np.arange(nx)[None, :]
        c0 = int(math.floor(cx)) + 1
        if rotation == "counterclockwise":  # excited strip left of the core, moving left
            excited = rows & (cols >= c0 - w_ex) & (cols < c0)
            refractory = rows & (cols >= c0) & (cols < c0 + w_ref)
        else:  # mirror image, moving right
            excited = rows & (cols >= c0) & (cols < c0 + w_ex)
            refractory = rows & (cols >= c0 - w_ref) & (cols < c0)
        if not excited.any():
            raise WavesError("the grid is too small for a spiral initial condition")
        _fill(state, refractory, spec.refractory(params))
        _fill(state, excited, spec.excited(params))
    elif kind == "target":
        _fill(state, disc((ny, nx), (cy, cx), STIMULUS_RADIUS / spacing), spec.excited(params))
    return state


@dataclass(frozen=True)
class Pacemaker:
    """A site that fires periodically: its disc is set to the excited state.

    y_um, x_um: centre (um, x_um = col * pixel_size_um).  period_min: firing
    period (minutes).  radius_um: disc radius (None: 2 model length units).
    first_min: time of the first firing (minutes).
    """

    y_um: float
    x_um: float
    period_min: float
    radius_um: float | None = None
    first_min: float = 0.0

    def __post_init__(self) -> None:
        if not (math.isfinite(self.period_min) and self.period_min > 0):
            raise WavesError(f"pacemaker period must be > 0 min, got {self.period_min}")
        if self.radius_um is not None and not self.radius_um > 0:
            raise WavesError(f"pacemaker radius must be > 0 um, got {self.radius_um}")
        if not math.isfinite(self.first_min) or self.first_min < 0:
            raise WavesError(f"pacemaker first firing must be >= 0 min, got {self.first_min}")

    def firing_times_min(self, until_min: float) -> np.ndarray:
        """Firing times (minutes) in [first_min, until_min]."""
        if until_min < self.first_min:
            return np.zeros(0)
        n = int(math.floor((until_min - self.first_min) / self.period_min + 1e-9)) + 1
        return self.first_min + self.period_min * np.arange(n)

    def to_dict(self) -> dict:
        return {
            "y_um": self.y_um, "x_um": self.x_um, "period_min": self.period_min,
            "radius_um": self.radius_um, "first_min": self.first_min,
        }


def random_pacemakers(
    n: int, *, field_um: tuple[float, float], period_min: tuple[float, float],
    rng: np.random.Generator, radius_um: float | None = None,
) -> list[Pacemaker]:
    """`n` spontaneous pacemakers at uniform random sites with uniform random
    periods in [period_min[0], period_min[1]] and random first firings within
    one period (desynchronised)."""
    if n < 0:
        raise WavesError(f"number of pacemakers must be >= 0, got {n}")
    lo, hi = period_min
    if not 0 < lo <= hi:
        raise WavesError(f"pacemaker period range must satisfy 0 < low <= high, got {period_min}")
    out = []
    for _ in range(n):
        period = float(rng.uniform(lo, hi))
        out.append(Pacemaker(
            y_um=float(rng.uniform(0, field_um[0])), x_um=float(rng.uniform(0, field_um[1])),
            period_min=period, radius_um=radius_um, first_min=float(rng.uniform(0, period)),
        ))
    return out
