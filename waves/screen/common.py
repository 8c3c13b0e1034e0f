"""Constants of a screen: exit codes, file names, metrics and their units."""

from __future__ import annotations

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_USAGE = 2
EXIT_SOME_FAILED = 3

REQUIRED_COLUMNS = ("path", "group")
KNOWN_COLUMNS = ("path", "group", "replicate", "date", "pixel_size_um", "frame_interval_s")
STACKS_FOLDER = "stacks"
HASH_CACHE = "input_hashes.json"
LOCK_FILE = "screen.lock"
TABLE_CSV = "screen_table.csv"
TABLE_PARQUET = "screen_table.parquet"
STATS_CSV = "statistics.csv"
STATS_JSON = "statistics.json"

# quartile blocks of summary.json expanded into columns <name>_median, _q25, _q75, _n
QUARTILE_BLOCKS = (
    "period_min",
    "front_speed_um_per_min",
    "wavelength_um",
    "front_speed_phase_velocity_um_per_min",
    "front_speed_displacement_um_per_min",
)
# metrics compared between groups unless the caller picks others
DEFAULT_METRICS = (
    "period_min_median",
    "front_speed_um_per_min_median",
    "wavelength_um_median",
    "front_speed_phase_velocity_um_per_min_median",
    "dominant_period_min",
    "n_spiral_cores",
)
METRIC_UNITS = {
    "period_min": "min",
    "front_speed_um_per_min": "um/min",
    "wavelength_um": "um",
    "front_speed_phase_velocity_um_per_min": "um/min",
    "front_speed_displacement_um_per_min": "um/min",
    "dominant_period_min": "min",
    "period_first_window_min": "min",
    "period_last_window_min": "min",
    "n_spiral_cores": "count",
    "n_centres": "count",
    "cores_per_cm2": "1/cm^2",
    "signal_fraction": "fraction",
    "duration_min": "min",
}


def metric_unit(column: str) -> str:
    """Unit of a combined-table metric column ('' when it has none)."""
    if column in METRIC_UNITS:
        return METRIC_UNITS[column]
    for block in QUARTILE_BLOCKS:
        if column.startswith(block + "_"):
            return "count" if column.endswith("_n") else METRIC_UNITS[block]
    return ""
