"""The analysis pipeline: a calibrated stack -> period, front speed,
wavelength and spiral cores, in bounded memory.

0. Stage drift (every run, `drift_auto`): every frame registered, coarsely,
   against a temporal-median reference of its high-passed texture; jumps found;
   corrected when it exceeds a quarter of an analysis-grid pixel (or as
   `register` says); the border strip a correction leaves without data is
   masked (`covered`) and never measured.
1. A first look (frame blocks): the temporal-mean image, a check for flat or
   non-finite movies, and the dominant wavelength of a dozen frame differences
   a quarter period apart, put back by the drift estimate.  The
   analysis grid is the recorded one binned so that a wavelength spans about
   24 pixels (waves are smooth on that scale; binning averages camera noise
   and cuts the work), unless the user fixes the factor.
2. Cleaning (frame blocks): binning, drift correction (when decided), illumination
   flattening (a gain from the temporal-mean image), mean removal and spatial
   smoothing tied to the wavelength (cut symmetrically at the frame edges, so
   fronts keep their direction and spacing there).  The cleaned movie is held in memory
   when it fits the budget, else in a float32 scratch file beside the outputs.
   A sparse set of rows then gives the dominant period, which sets the
   band-pass and how many frames at each end are trimmed (filter edges make
   false singularities).
3. Row strips (all frames, a halo of 3 rows): analytic signal with the
   band-pass in the same FFT, phase and amplitude, then one compiled pass for
   period (whole cycles), phase velocity and coherence over the movie and in
   time windows, activation-time plane fits and topological charges.  Peak
   memory is set by the strip, which is sized from the memory budget.
4. Whole maps: the speeds are corrected for the curvature bias of the
   smoothing (a front of radius r looks sigma^2 / (2 r^2) faster), and
   speeds that would need more than a 3 % correction are dropped.

Per-frame times (`times_s`) and frames declared bad (`valid_frames`) put the
movie on a uniform time grid as it is binned (waves.preprocess.timebase):
dropped and bad frames are interpolated in time; gaps (>= 3 missing frames),
a settling margin next to them and bad frames are left out of every
measurement (waves.analyse.segments); summary['recording'] lists them.

Cores are detected per frame from the collected charges, tracked, and kept
when they live for at least about one period.  Everything is in analysis-grid
pixels and frames until the end, where the calibration turns it into um (in
the recorded image's coordinates), minutes and um/min.  Band polarity does
not matter: amplitude and phase winding are the same for bright and dark
bands.
"""

from waves.analyse.clean import clean_buffer
from waves.analyse.options import DEFAULT_PERIOD_BAND_MIN, Analysis, AnalysisOptions
from waves.analyse.pipeline import analyse_movie

__all__ = ["AnalysisOptions", "Analysis", "analyse_movie", "clean_buffer", "DEFAULT_PERIOD_BAND_MIN"]
