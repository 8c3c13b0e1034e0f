"""Sources of the analytic wave fields of `waves.synthetic` and their period laws.

A source emits with the phase Phi(t) = 2 pi * integral_0^t dt'/T(t'); its
wave travels at a constant speed, so the phase at distance r is Phi(t - r/c).
Two period laws:

- `_PeriodLaw`: a constant period, or one drifting linearly in time, with Phi
  in closed form (a logarithm);
- `_FiringLaw`: firing times given one by one (a target whose firing times
  are jittered about a regular period with a known spread, `jitter_min`):
  Phi(t_n) = 2 pi n at the n-th firing time and Phi is linear in between, so
  the excitation peaks exactly at the firing times and every interval between
  successive waves is t_(n+1) - t_n (`firing_times_min`).

A spiral's core can move (`SpiralSource.orbit_radius_um`, `velocity_um_per_min`):
the core is at the position `core_position` gives at time t and the phase
about it is that of a spiral centred there at that moment, so the phase
singularity sits exactly on the path.
"""

from __future__ import annotations

import math
from dataclasses import KW_ONLY, dataclass

import numpy as np

from waves.errors import WavesError

_TWO_PI = 2.0 * math.pi

# ----------------------------------------------------------------------------
# sources


def _finite(name: str, value: object) -> float:
    try:
        out = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise WavesError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(out):
        raise WavesError(f"{name} must be finite, got {value!r}")
    return out


def _positive(name: str, value: object, hint: str) -> float:
    out = _finite(name, value)
    if out <= 0.0:
        raise WavesError(f"{name} must be positive, got {value!r} ({hint})")
    return out


def _check_period_fields(kind: str, src: Source) -> None:
    """Validate and normalise the period options shared by all sources."""
    values = {
        "period_min": _positive(f"{kind}.period_min", src.period_min, "minutes, e.g. 6.5"),
        "phase0": _finite(f"{kind}.phase0", src.phase0),
    }
    if src.period_end_min is not None:
        values["period_end_min"] = _positive(
            f"{kind}.period_end_min", src.period_end_min, "minutes, or None for a constant period"
        )
    if src.drift_end_min is not None:
        values["drift_end_min"] = _positive(
            f"{kind}.drift_end_min", src.drift_end_min,
            "minutes after the first frame, or None for the last frame",
        )
    for name, value in values.items():
        object.__setattr__(src, name, value)


@dataclass(frozen=True)
class TargetSource:
    """A pacemaker at (x_um, y_um) emitting concentric rings every `period_min`.

    phase0          phase offset (radians).
    period_end_min  if given, the period drifts linearly from `period_min` at
                    t = 0 to this value at `drift_end_min`.
    drift_end_min   end of the drift, minutes after the first frame
                    (None: the last frame).
    jitter_min      if positive, the n-th firing (n >= 1) is at n * period_min
                    plus a Gaussian deviate of this spread (minutes, seeded by
                    `jitter_seed`, clipped to +/- 0.4 period_min so the order
                    is kept); the firing at t = 0 and those before are
                    regular.  `firing_times_min` gives the times.
    speed_um_per_min  if given, this source's waves travel at this speed (a
                    territory of its own speed: another strain, another cell
                    density); None: the field's speed.  Each pixel still takes
                    the latest wave to reach it (first arrival: the eikonal
                    construction with a speed per territory).
    curvature_um2_per_min  if positive, D of the eikonal relation c = c0 - D kappa
                    (Tyson & Keener 1988): a ring of radius r (curvature 1/r)
                    moves at c0 - D / r, so rings near the pacemaker are slower;
                    the arrival time is the exact integral of dr / (c0 - D / r)
                    from r_m = 2 D / c0 on (inside r_m the rings move at c0 / 2).
    """

    x_um: float
    y_um: float
    period_min: float
    _: KW_ONLY
    phase0: float = 0.0
    period_end_min: float | None = None
    drift_end_min: float | None = None
    jitter_min: float = 0.0
    jitter_seed: int = 0
    speed_um_per_min: float | None = None
    curvature_um2_per_min: float = 0.0

    def __post_init__(self) -> None:
        object.__setattr__(self, "x_um", _finite("TargetSource.x_um", self.x_um))
        object.__setattr__(self, "y_um", _finite("TargetSource.y_um", self.y_um))
        _check_period_fields("TargetSource", self)
        j = _finite("TargetSource.jitter_min", self.jitter_min)
        if j < 0.0:
            raise WavesError(f"TargetSource.jitter_min must be >= 0 minutes, got {self.jitter_min!r}")
        if j > 0.0 and self.period_end_min is not None and self.period_end_min != self.period_min:
            raise WavesError("a jittered TargetSource has a constant mean period; drop period_end_min")
        if isinstance(self.jitter_seed, bool) or not isinstance(self.jitter_seed, (int, np.integer)):
            raise WavesError(f"TargetSource.jitter_seed must be a whole number, got {self.jitter_seed!r}")
        object.__setattr__(self, "jitter_min", j)
        d = _finite("TargetSource.curvature_um2_per_min", self.curvature_um2_per_min)
        if d < 0.0:
            raise WavesError(f"TargetSource.curvature_um2_per_min must be >= 0, got {self.curvature_um2_per_min!r}")
        object.__setattr__(self, "curvature_um2_per_min", d)
        if self.speed_um_per_min is not None:
            object.__setattr__(self, "speed_um_per_min", _positive(
                "TargetSource.speed_um_per_min", self.speed_um_per_min, "micrometres per minute, e.g. 350"))


@dataclass(frozen=True)
class SpiralSource:
    """An Archimedean spiral rotating about a core at (x_um, y_um).

    charge  +1 (rotates clockwise as displayed) or -1 (counterclockwise);
            the phase winds by 2 pi * charge counterclockwise as displayed.
    orbit_radius_um, orbit_period_min
            a meandering core: it circles (x_um, y_um) counterclockwise as
            displayed at this radius, once per `orbit_period_min`, starting
            at (x_um + radius, y_um) at t = 0.
    velocity_um_per_min
            a drifting core: (vx, vy) added to the position per minute
            (vy > 0 moves down the screen, like y).
    `core_position` gives the path.  Other options as for `TargetSource`.
    """

    x_um: float
    y_um: float
    period_min: float
    _: KW_ONLY
    charge: int = 1
    phase0: float = 0.0
    period_end_min: float | None = None
    drift_end_min: float | None = None
    orbit_radius_um: float = 0.0
    orbit_period_min: float | None = None
    velocity_um_per_min: tuple[float, float] = (0.0, 0.0)

    def __post_init__(self) -> None:
        object.__setattr__(self, "x_um", _finite("SpiralSource.x_um", self.x_um))
        object.__setattr__(self, "y_um", _finite("SpiralSource.y_um", self.y_um))
        if isinstance(self.charge, bool) or self.charge not in (1, -1):
            raise WavesError(
                f"SpiralSource.charge must be +1 (clockwise as displayed) or -1 "
                f"(counterclockwise as displayed), got {self.charge!r}"
            )
        object.__setattr__(self, "charge", int(self.charge))
        _check_period_fields("SpiralSource", self)
        radius = _finite("SpiralSource.orbit_radius_um", self.orbit_radius_um)
        if radius < 0.0:
            raise WavesError(f"SpiralSource.orbit_radius_um must be >= 0, got {self.orbit_radius_um!r}")
        object.__setattr__(self, "orbit_radius_um", radius)
        if radius > 0.0:
            object.__setattr__(self, "orbit_period_min", _positive(
                "SpiralSource.orbit_period_min", self.orbit_period_min, "minutes per turn of the core"))
        try:
            vx, vy = self.velocity_um_per_min
        except (TypeError, ValueError):
            raise WavesError(
                f"SpiralSource.velocity_um_per_min must be (vx, vy) in um/min, got {self.velocity_um_per_min!r}"
            ) from None
        object.__setattr__(self, "velocity_um_per_min", (
            _finite("SpiralSource.velocity_um_per_min[0]", vx), _finite("SpiralSource.velocity_um_per_min[1]", vy)))


@dataclass(frozen=True)
class PlanarSource:
    """A plane wave travelling in `direction_deg` (degrees counterclockwise
    from +x as displayed: 0 rightwards, 90 upwards on the screen).  Its phase
    is `phase0` on the line through pixel (0, 0) perpendicular to the travel
    direction at t = 0.  Other options as for `TargetSource`."""

    direction_deg: float
    period_min: float
    _: KW_ONLY
    phase0: float = 0.0
    period_end_min: float | None = None
    drift_end_min: float | None = None

    def __post_init__(self) -> None:
        object.__setattr__(self, "direction_deg", _finite("PlanarSource.direction_deg", self.direction_deg))
        _check_period_fields("PlanarSource", self)


Source = TargetSource | SpiralSource | PlanarSource


def rotation_of_charge(charge: int) -> str:
    """Rotation sense, as displayed, of a spiral of topological charge `charge`.

    Derivation: phase = omega t - k r + q theta_disp + phi0 with omega > 0 and
    theta_disp counted counterclockwise as displayed.  Following a line of
    constant phase at fixed r, d phase = 0 = omega dt + q d theta_disp, so
    d theta_disp / dt = -omega / q: for q = +1 the arms turn towards smaller
    theta_disp, i.e. CLOCKWISE as displayed; for q = -1 COUNTERCLOCKWISE.
    """
    if isinstance(charge, bool) or charge not in (1, -1):
        raise WavesError(f"a spiral's charge is +1 or -1, got {charge!r}")
    return "clockwise" if charge == 1 else "counterclockwise"


# ----------------------------------------------------------------------------
# period law: T(t) and Phi(t) = 2 pi int_0^t dt'/T(t'), in closed form


@dataclass(frozen=True)
class _PeriodLaw:
    """T = t0 for t <= 0, linear to t1 at t = d, t1 after (minutes)."""

    t0: float
    t1: float
    d: float

    @property
    def slope(self) -> float:
        return (self.t1 - self.t0) / self.d if self.t1 != self.t0 else 0.0

    def period(self, t: np.ndarray | float) -> np.ndarray:
        t = np.asarray(t, dtype=np.float64)
        if self.slope == 0.0:
            return np.full_like(t, self.t0)
        return np.where(t <= 0.0, self.t0, np.where(t >= self.d, self.t1, self.t0 + self.slope * t))

    def phase(self, t: np.ndarray) -> np.ndarray:
        """Phi(t) in radians, Phi(0) = 0 (float64)."""
        t = np.asarray(t, dtype=np.float64)
        if self.slope == 0.0:
            return t * (_TWO_PI / self.t0)
        a = self.slope
        tm = np.clip(t, 0.0, self.d)
        # int_0^tm dt/(t0 + a t) = log1p(a tm / t0) / a  (exact)
        out = np.log1p(tm * (a / self.t0)) * (_TWO_PI / a)
        out += np.minimum(t, 0.0) * (_TWO_PI / self.t0)
        out += np.maximum(t - self.d, 0.0) * (_TWO_PI / self.t1)
        return out


class _FiringLaw:
    """Phi(t_n) = 2 pi n at the firing times t_0 = 0 < t_1 < ..., linear in
    between; regular with `period` before t = 0 and after the last one."""

    def __init__(self, period: float, times: np.ndarray) -> None:
        self.t0 = self.t1 = float(period)
        self.d = 1.0
        self.times = np.asarray(times, dtype=np.float64)
        self.slope = 0.0

    def period(self, t: np.ndarray | float) -> np.ndarray:
        """Length of the firing interval holding t (minutes)."""
        t = np.asarray(t, dtype=np.float64)
        k = np.clip(np.searchsorted(self.times, t, side="right") - 1, 0, len(self.times) - 2)
        inside = (t >= 0.0) & (t < self.times[-1])
        return np.where(inside, np.diff(self.times)[k], self.t0)

    def phase(self, t: np.ndarray) -> np.ndarray:
        t = np.asarray(t, dtype=np.float64)
        n = np.arange(len(self.times), dtype=np.float64)
        last = self.times[-1]
        cycles = np.interp(t, self.times, n)
        cycles = np.where(t < 0.0, t / self.t0, cycles)
        cycles = np.where(t > last, n[-1] + (t - last) / self.t0, cycles)
        return cycles * _TWO_PI


def firing_times_min(src: Source, last_frame_min: float) -> np.ndarray:
    """Firing times (minutes, from t = 0 to past `last_frame_min`) of a source:
    n * period for a regular one, the jittered times for `TargetSource.jitter_min` > 0."""
    n = int(math.ceil(max(last_frame_min, 0.0) / src.period_min)) + 3
    regular = np.arange(n + 1, dtype=np.float64) * src.period_min
    if not isinstance(src, TargetSource) or src.jitter_min == 0.0:
        return regular
    rng = np.random.default_rng(int(src.jitter_seed))
    dev = np.clip(rng.normal(0.0, src.jitter_min, n), -0.4 * src.period_min, 0.4 * src.period_min)
    regular[1:] += dev
    return regular


def speed_of(src: Source, field_speed_um_per_min: float) -> float:
    """The speed of `src`'s waves: its own when it has one, else the field's."""
    own = getattr(src, "speed_um_per_min", None)
    return float(field_speed_um_per_min if own is None else own)


def travel_delay_min(src: Source, dist_um: np.ndarray, field_speed_um_per_min: float) -> np.ndarray:
    """Minutes a wave of `src` takes to reach distance `dist_um`: dist / c, or
    with a curvature coefficient D the integral of dr / (c - D / r) (see
    TargetSource): T = 4 D / c^2 + (r - r_m) / c + D / c^2 ln((c r - D) / (c r_m - D))
    for r >= r_m = 2 D / c, and 2 r / c inside (derived here: dT/dr = 1 / (c - D / r))."""
    c = speed_of(src, field_speed_um_per_min)
    d = float(getattr(src, "curvature_um2_per_min", 0.0) or 0.0)
    r = np.asarray(dist_um, dtype=np.float64)
    if d <= 0.0:
        return r / c
    rm = 2.0 * d / c
    far = np.maximum(r, rm)
    outer = 4.0 * d / c**2 + (far - rm) / c + d / c**2 * np.log((c * far - d) / (c * rm - d))
    return np.where(r >= rm, outer, 2.0 * r / c)


def moves(src: Source) -> bool:
    """Whether the source's core moves (a meandering or drifting spiral)."""
    return isinstance(src, SpiralSource) and (src.orbit_radius_um > 0.0 or src.velocity_um_per_min != (0.0, 0.0))


def core_position(src: Source, t_min: np.ndarray | float) -> tuple[np.ndarray, np.ndarray]:
    """(x_um, y_um) of a source's core at times `t_min` (constant unless it moves)."""
    t = np.asarray(t_min, dtype=np.float64)
    x = np.full(t.shape, float(src.x_um))
    y = np.full(t.shape, float(src.y_um))
    if moves(src):
        vx, vy = src.velocity_um_per_min
        x = x + vx * t
        y = y + vy * t
        if src.orbit_radius_um > 0.0:
            a = _TWO_PI * t / src.orbit_period_min
            x = x + src.orbit_radius_um * np.cos(a)
            y = y - src.orbit_radius_um * np.sin(a)  # counterclockwise as displayed
    return x, y


def _law_of(src: Source, last_frame_min: float) -> _PeriodLaw | _FiringLaw:
    if isinstance(src, TargetSource) and src.jitter_min > 0.0:
        return _FiringLaw(src.period_min, firing_times_min(src, last_frame_min))
    if src.period_end_min is None or src.period_end_min == src.period_min:
        return _PeriodLaw(src.period_min, src.period_min, 1.0)
    d = src.drift_end_min if src.drift_end_min is not None else last_frame_min
    if d <= 0.0:
        raise WavesError(
            "a drifting period needs a drift duration: the movie has a single frame, so give "
            "drift_end_min (minutes) on the source"
        )
    return _PeriodLaw(src.period_min, src.period_end_min, d)


