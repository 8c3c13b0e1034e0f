"""The 2-D field a model runs on: size, spacing, boundaries, cells and obstacles.

Conventions (shared by every model):

- Arrays are indexed [row, col] = (y, x).  The grid is cell-centred: pixel
  (i, j) holds the value at the centre of a square of side `spacing` (model
  length units); the medium spans ny * spacing by nx * spacing.
- Boundaries are no-flux ("noflux", the default: the ghost value outside the
  box equals the edge value, so the 5-point Laplacian conserves the sum of the
  diffusing variable exactly) or periodic ("periodic").
- `obstacles` (bool, True = outside the medium) are holes in the domain: the
  state there is frozen and no flux crosses their edges (same rule as the box
  edge).  Their pixels show the rest state in movies.
- `occupancy` (float in [0, 1], 1 = cells present, 0 = no cells) scales the
  reaction terms.  What an empty pixel means is the model's choice, stated in
  its module docstring (FitzHugh-Nagumo, Barkley: no reaction at all, the
  diffusing variable passes through passively and the slow one is frozen).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from waves.errors import WavesError

__all__ = ["Grid", "BOUNDARIES"]

BOUNDARIES = ("noflux", "periodic")


def _as_shape(shape_yx) -> tuple[int, int]:
    try:
        ny, nx = (int(s) for s in shape_yx)
    except (TypeError, ValueError):
        raise WavesError(
            f"grid size must be two integers (rows, columns), got {shape_yx!r}"
        ) from None
    if ny < 1 or nx < 1:
        raise WavesError(
            f"grid size must be positive, got {ny} x {nx}; give e.g. --size 256 256"
        )
    return ny, nx


@dataclass(frozen=True, eq=False)
class Grid:
    """A cell-centred 2-D grid.

    shape_yx: (rows, columns).  spacing: grid step h in model length units.
    boundary: 'noflux' or 'periodic'.  occupancy: None (cells everywhere) or a
    float array (rows, columns) in [0, 1].  obstacles: None or a bool array,
    True where there is no medium.
    """

    shape_yx: tuple[int, int]
    spacing: float
    boundary: str = "noflux"
    occupancy: np.ndarray | None = None
    obstacles: np.ndarray | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "shape_yx", _as_shape(self.shape_yx))
        h = float(self.spacing)
        if not np.isfinite(h) or h <= 0:
            raise WavesError(f"grid spacing must be a positive number, got {self.spacing!r}")
        object.__setattr__(self, "spacing", h)
        if self.boundary not in BOUNDARIES:
            raise WavesError(
                f"unknown boundary {self.boundary!r}; use one of {', '.join(BOUNDARIES)}"
            )
        if self.occupancy is not None:
            occ = np.asarray(self.occupancy)
            if occ.shape != self.shape_yx:
                raise WavesError(
                    f"cell occupancy mask has shape {occ.shape}, the grid is {self.shape_yx}; "
                    "give a mask of the grid's size"
                )
            occ = occ.astype(np.float32)
            if not np.all(np.isfinite(occ)) or occ.min() < 0 or occ.max() > 1:
                raise WavesError("cell occupancy must lie in [0, 1] (1 = cells, 0 = no cells)")
            occ.setflags(write=False)
            object.__setattr__(self, "occupancy", occ)
        if self.obstacles is not None:
            obs = np.asarray(self.obstacles)
            if obs.shape != self.shape_yx:
                raise WavesError(
                    f"obstacle mask has shape {obs.shape}, the grid is {self.shape_yx}; "
                    "give a mask of the grid's size"
                )
            obs = obs.astype(bool)
            if obs.all():
                raise WavesError("the obstacle mask covers the whole grid; leave some medium")
            obs.setflags(write=False)
            object.__setattr__(self, "obstacles", obs)

    @property
    def periodic(self) -> bool:
        return self.boundary == "periodic"

    @property
    def n_cells(self) -> int:
        return self.shape_yx[0] * self.shape_yx[1]

    @property
    def ndim_effective(self) -> int:
        """1 for a single row or column (the Laplacian is then 1-D), else 2."""
        return 1 if min(self.shape_yx) == 1 else 2

    @property
    def is_plain(self) -> bool:
        """True when no occupancy mask and no obstacles are set (fast path)."""
        return self.occupancy is None and self.obstacles is None

    def domain(self) -> np.ndarray:
        """float32 (rows, columns): 1 inside the medium, 0 on obstacles."""
        if self.obstacles is None:
            return np.ones(self.shape_yx, np.float32)
        return (~self.obstacles).astype(np.float32)

    def occupancy_or_ones(self) -> np.ndarray:
        """float32 (rows, columns) occupancy, 1 where no mask was given."""
        if self.occupancy is None:
            return np.ones(self.shape_yx, np.float32)
        return np.array(self.occupancy, np.float32)

    def to_dict(self) -> dict:
        """JSON-friendly description (masks summarised, not stored)."""
        return {
            "shape_yx": list(self.shape_yx),
            "spacing_model": self.spacing,
            "boundary": self.boundary,
            "occupancy_fraction": (
                None if self.occupancy is None else float(np.mean(self.occupancy))
            ),
            "obstacle_fraction": (
                None if self.obstacles is None else float(np.mean(self.obstacles))
            ),
        }
