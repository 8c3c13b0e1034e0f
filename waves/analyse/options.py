"""Options of an analysis, its result type and the pipeline's constants."""

from __future__ import annotations

from dataclasses import dataclass, field

from waves.errors import WavesError

# Trade-sensible default: aggregating fields show periods of about 8-10 min
# early falling to 2-4 min late (REFERENCES.md, [memory]); 6 min is typical.
DEFAULT_PERIOD_BAND_MIN = (2.0, 20.0)

HALO_PX = 3  # gradient (1) + activation-fit radius (2)
FIT_RADIUS_PX = 2
MAX_SMOOTHING_CORRECTION = 0.03  # larger curvature corrections of a speed are not trusted: the speed is dropped
# Before the FFT band-pass each pixel may lose its least-squares polynomial of this degree (a slow
# trend: under one cycle over the movie, far below the band), so a fade left after the brightness
# correction is no sawtooth at the transform's wrap-around.  Measured (target and spiral, 128
# frames, 40 % linear fade, brightness correction off): period -4.8 % / -5.2 %, speed +21 % without
# the detrend; +0.02 % / +0.01 %, 0.0 % / -1.5 % with degree 2 (clean field unchanged: +-0.02 %).
# Off (None) by default: on a simulated relay field that starts at rest it moved a pacemaker's
# own period by -0.08 % (7.9926 min against 7.9992 without, stimulus 8 min), beyond that test's
# 0.05 %; with the per-frame brightness correction on, the fade is gone before the FFT anyway.
DETREND_DEGREE: int | None = None
# Mirror padding (periods each end) before the FFT, analytic_signal(pad_frames=...).  Off: on the
# same movies one period of mirrored frames biased the clean-field period by -0.15 % and the speed by
# -0.5 % (the reflection folds the phase, and the narrow band's ringing reaches past the trimmed
# 0.75 period), while the detrend alone already removes the trend's wrap-around.
PAD_PERIODS = 0.0
PIXELS_PER_WAVELENGTH = 24  # target of the automatic analysis binning
DISCLAIMER = "research measurements; not a clinical, diagnostic or safety judgement"


@dataclass(frozen=True)
class AnalysisOptions:
    """What `analyse_movie` does.  Units in the names."""

    period_band_min: tuple[float, float] = DEFAULT_PERIOD_BAND_MIN
    phase_method: str = "hilbert"  # or "delay": delay embedding with a quarter-period lag
    analysis_bin: int | None = None  # None: bin so a wavelength spans ~24 px
    flatten: bool = True
    brightness: bool = True  # per-frame lamp gain/offset removed, flicker frames interpolated
    register: bool | str | None = None  # None/'auto': correct drift when it matters; True/'on': always; False/'off': never
    smooth_sigma_um: float | None = None  # None: wavelength / 12, from the first look
    min_amplitude: float | None = None  # signal floor of the amplitude map; None: Otsu
    min_coherence: float = 0.8  # speed only where the wave direction is steady
    persistent_periods: float = 2.0  # a core must live this many periods (false ones along a cleared strip: 1.5-2)
    window_periods: float = 3.0  # period time course: window length in periods
    memory_budget_mb: float = 400.0
    workers: int = 2

    def __post_init__(self) -> None:
        lo, hi = self.period_band_min
        if not (0 < lo < hi):
            raise WavesError(
                "period band must be two increasing positive numbers of minutes, "
                f"got {self.period_band_min!r}"
            )
        if self.analysis_bin is not None and (int(self.analysis_bin) != self.analysis_bin or self.analysis_bin < 1):
            raise WavesError(f"analysis binning must be a whole number >= 1, got {self.analysis_bin!r}")
        if self.smooth_sigma_um is not None and not self.smooth_sigma_um >= 0:
            raise WavesError("smoothing sigma must be zero or positive (um)")
        if not 0 <= self.min_coherence < 1:
            raise WavesError(f"min_coherence must be in [0, 1), got {self.min_coherence!r}")
        if self.min_amplitude is not None and not self.min_amplitude >= 0:
            raise WavesError("min_amplitude must be zero or positive")
        for name in ("persistent_periods", "window_periods", "memory_budget_mb"):
            if not getattr(self, name) > 0:
                raise WavesError(f"{name} must be positive, got {getattr(self, name)!r}")
        if self.phase_method not in ("hilbert", "delay"):
            raise WavesError(f"phase method must be 'hilbert' or 'delay', got {self.phase_method!r}")
        if not (self.register is None or isinstance(self.register, bool) or self.register in ("auto", "on", "off")):
            raise WavesError(f"register must be None, True, False, 'auto', 'on' or 'off', got {self.register!r}")
        if int(self.workers) < 1:
            raise WavesError("workers must be at least 1")


@dataclass(frozen=True)
class Analysis:
    """Everything an analysis found, in calibrated units, ready to write.

    `maps` are on the analysis grid, whose pixel size and origin (the
    recorded-image position of map pixel (0, 0), in um) are in
    summary['analysis']['grid'].
    """

    summary: dict
    maps: dict  # name -> (y, x) float32 array, names carry units
    tables: dict  # name -> {column: 1-D array}
    warnings: tuple[str, ...]
    timings_s: dict = field(default_factory=dict)
    stacks: dict = field(default_factory=dict)  # name -> (n, y, x) array, e.g. territories per window
