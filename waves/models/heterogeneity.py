"""Spatial heterogeneity, noise and developmental ramps of model parameters.

- `correlated_noise`: Gaussian-filtered white noise with a correlation length,
  normalised to zero mean and unit standard deviation over the grid.
- `Heterogeneity(param, rel_sd, correlation_um)`: the parameter varies in
  space as value * (1 + rel_sd * noise), the factor floored at 0.05 so a rate
  never changes sign (the floor only acts beyond -4.75 sd at rel_sd = 0.2).
- `Ramp(param, start, end, start_min, end_min)`: the parameter goes linearly
  from `start` to `end` between the two times (minutes), constant outside:
  a developmental path (e.g. from oscillatory to excitable).
- `add_noise`: additive Gaussian noise on the diffusing variable, Euler-
  Maruyama with the kick held over a chunk: sd = intensity * sqrt(chunk time).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import gaussian_filter

from waves.errors import WavesError

__all__ = ["correlated_noise", "Heterogeneity", "Ramp", "add_noise", "MULTIPLIER_FLOOR"]

MULTIPLIER_FLOOR = 0.05


def correlated_noise(
    shape_yx: tuple[int, int], *, correlation_px: float, seed: int | np.random.Generator,
    periodic: bool = False,
) -> np.ndarray:
    """float32 noise (rows, cols), zero mean, unit sd, Gaussian kernel sd `correlation_px`.

    correlation_px = 0 gives white noise.  `periodic` wraps the filter.
    """
    if not (math.isfinite(correlation_px) and correlation_px >= 0):
        raise WavesError(
            f"correlation length must be >= 0 pixels, got {correlation_px!r}"
        )
    rng = np.random.default_rng(seed)
    white = rng.standard_normal(tuple(shape_yx))
    if correlation_px > 0:
        white = gaussian_filter(white, correlation_px, mode="wrap" if periodic else "reflect")
    sd = white.std()
    if sd == 0:
        return np.zeros(tuple(shape_yx), np.float32)
    return ((white - white.mean()) / sd).astype(np.float32)


@dataclass(frozen=True)
class Heterogeneity:
    """Random spatial variation of one parameter.

    param: parameter name.  rel_sd: relative standard deviation (0.1 = 10 %).
    correlation_um: correlation length (sd of the Gaussian filter) in um.
    """

    param: str
    rel_sd: float
    correlation_um: float

    def __post_init__(self) -> None:
        if not (math.isfinite(self.rel_sd) and self.rel_sd >= 0):
            raise WavesError(f"relative sd of {self.param!r} must be >= 0, got {self.rel_sd}")
        if not (math.isfinite(self.correlation_um) and self.correlation_um >= 0):
            raise WavesError(
                f"correlation length of {self.param!r} must be >= 0 um, got {self.correlation_um}"
            )

    def multiplier(
        self, shape_yx, *, pixel_size_um: float, seed, periodic: bool = False
    ) -> np.ndarray:
        """float32 factor field 1 + rel_sd * noise, floored at MULTIPLIER_FLOOR."""
        noise = correlated_noise(
            shape_yx, correlation_px=self.correlation_um / pixel_size_um, seed=seed,
            periodic=periodic,
        )
        return np.maximum(np.float32(1) + np.float32(self.rel_sd) * noise,
                          np.float32(MULTIPLIER_FLOOR))

    def to_dict(self) -> dict:
        return {"param": self.param, "rel_sd": self.rel_sd, "correlation_um": self.correlation_um}


@dataclass(frozen=True)
class Ramp:
    """Linear change of one parameter over time (minutes of simulated time).

    end_min None means the end of the run.
    """

    param: str
    start: float
    end: float
    start_min: float = 0.0
    end_min: float | None = None

    def __post_init__(self) -> None:
        for name in ("start", "end", "start_min"):
            if not math.isfinite(getattr(self, name)):
                raise WavesError(f"ramp of {self.param!r}: {name} must be finite")
        if self.end_min is not None and not self.end_min > self.start_min:
            raise WavesError(
                f"ramp of {self.param!r}: end_min ({self.end_min}) must be after "
                f"start_min ({self.start_min})"
            )

    def value(self, t_min: float, *, run_min: float) -> float:
        """Parameter value at time t_min."""
        t1 = run_min if self.end_min is None else self.end_min
        if t1 <= self.start_min or t_min <= self.start_min:
            return float(self.start) if t_min <= self.start_min else float(self.end)
        if t_min >= t1:
            return float(self.end)
        f = (t_min - self.start_min) / (t1 - self.start_min)
        return float(self.start + f * (self.end - self.start))

    def to_dict(self) -> dict:
        return {
            "param": self.param, "start": self.start, "end": self.end,
            "start_min": self.start_min, "end_min": self.end_min,
        }


def add_noise(
    u: np.ndarray, *, intensity: float, duration: float, rng: np.random.Generator,
    where: np.ndarray | None = None,
) -> None:
    """Add N(0, intensity^2 * duration) to u in place (float32), only where `where` > 0."""
    if intensity <= 0 or duration <= 0:
        return
    kick = rng.standard_normal(u.shape, dtype=np.float32)
    kick *= np.float32(intensity * math.sqrt(duration))
    if where is not None:
        kick *= where
    u += kick
