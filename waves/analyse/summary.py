"""Whole maps and tracks -> summary, tables and maps in calibrated units."""

from __future__ import annotations

import time
import warnings as warnings_module
from dataclasses import asdict

import numpy as np
import scipy.ndimage

from waves import __version__, preprocess
from waves.analyse import confidence, speed_regions
from waves.analyse.centre_rules import (
    without_edge_entries,
    without_hole_echoes,
    without_tiny_territories,
)
from waves.analyse.options import DISCLAIMER, Analysis, AnalysisOptions
from waves.analyse.segments import arrivals_by_stretch
from waves.analyse.strips import _detect_and_track, _Maps, arrival_field
from waves.measure.centres import emission_intervals, track_centres
from waves.measure.period import quartiles
from waves.measure.significance import fill_holes_smaller_than
from waves.measure.speed import (
    kernel_in_one_territory,
    kernel_saw_signal,
)
from waves.phase import tracking
from waves.preprocess.texture import plaquettes_inside
from waves.units import Calibration


def _grid(cal: Calibration, factor: int) -> dict:
    """Analysis-grid pixel size and the recorded-image position (um) of its
    pixel (0, 0): binned pixel (r, c) covers recorded rows r*f .. r*f + f - 1,
    so its centre is at recorded pixel r*f + (f - 1)/2."""
    px = cal.pixel_size_um
    origin = 0.5 * (factor - 1) * px
    return {"bin": factor, "pixel_size_um": px * factor, "origin_x_um": origin, "origin_y_um": origin}


def _to_recorded(table: dict, *, factor: int, frame_offset: int, pos_cols=("row", "col")) -> dict:
    out = dict(table)
    for k in pos_cols:
        if k in out:
            out[k] = np.asarray(out[k], dtype=np.float64) * factor + 0.5 * (factor - 1)
    for k in ("frame", "first_frame", "last_frame"):
        if k in out:
            out[k] = np.asarray(out[k]) + frame_offset
    for k in ("mean_row", "mean_col"):
        if k in out:
            out[k] = np.asarray(out[k], dtype=np.float64) * factor + 0.5 * (factor - 1)
    for k in ("gyration_radius_px", "max_excursion_px", "path_length_px"):
        if k in out:
            out[k] = np.asarray(out[k], dtype=np.float64) * factor
    return out


def _signal_without_empty_holes(amp, filled, options, core_tracks):
    strict = preprocess.signal_mask(amp, threshold=options.min_amplitude, min_size_px=9)
    holes, n = scipy.ndimage.label(filled & ~strict)
    if n == 0:
        return filled
    keep = np.zeros(n + 1, dtype=bool)
    ny, nx = amp.shape
    for r, c in zip(core_tracks["mean_row"], core_tracks["mean_col"], strict=True):
        r0, c0 = int(min(max(round(r), 0), ny - 1)), int(min(max(round(c), 0), nx - 1))
        window = holes[max(r0 - 1, 0) : r0 + 2, max(c0 - 1, 0) : c0 + 2]
        keep[np.unique(window)] = True
    keep[0] = False
    return strict | keep[holes]


def _rejected_table(rejected, *, factor: int, px: float) -> dict:
    """tables['rejected_centres']: candidates left out of the centres, with the reason
    (recorded-image um, like the centres)."""
    rows = list(rejected)
    area = (px * factor) ** 2 * 1e-6
    return {
        "kind": np.asarray([r[0] for r in rows], dtype=object),
        "x_um": np.asarray([(r[2] * factor + 0.5 * (factor - 1)) * px for r in rows], dtype=np.float64),
        "y_um": np.asarray([(r[1] * factor + 0.5 * (factor - 1)) * px for r in rows], dtype=np.float64),
        "territory_area_mm2": np.asarray([r[3] * area for r in rows], dtype=np.float64),
        "reason": np.asarray([r[4] for r in rows], dtype=object),
    }


def _summarise(maps: _Maps, *, cal, factor, options, period0, passband, trim, lag, windows, usable, sigma_px,
               mean_b, warnings, notes, frame_ok=None, cells=None, margin_px=0.0, covered=None, significant=None):
    """`significant`: (y, x) bool, the pixels whose time course beats red noise
    (waves.analyse.detect); nothing else is measured, and cores need it around them."""
    nyb, nxb = maps.amplitude.shape
    # pixels some frame has no data for (the border strip a drift correction leaves) are never measured
    covered = np.ones((nyb, nxb), dtype=bool) if covered is None else np.asarray(covered, dtype=bool)
    dt_min = cal.frame_interval_min
    px_b = cal.pixel_size_um * factor
    # the cell field: nothing measured outside it nor within a margin of its edge (cellfield)
    small = preprocess.small_hole_px(sigma_px)
    holey = np.ones((nyb, nxb), bool) if cells is None else cells.mask
    # small holes (specks, dead pixels) are bridged by the normalised convolution: one pixel for the
    # gradient stencil around them, not the activation fit's halo (a bright grain taken for a speck
    # next to a spiral core must not take the core with it)
    measured = preprocess.measurable(holey, margin=margin_px, hole_margin=1.0, small_hole_px=small)
    in_field = preprocess.fill_small_holes(holey, small)  # the kernel bridges specks: directions and territories do
    walkable = preprocess.measurable(in_field, margin=margin_px)
    if not measured.all():
        for name in ("period", "speed", "direction", "coherence", "omega"):
            arr = getattr(maps, name)
            arr[:, ~(measured if name in ("period", "speed") else walkable)] = np.nan
        maps.fit_speed[~measured] = np.nan
        if maps.fit_speed_w is not None:
            maps.fit_speed_w[:, ~measured] = np.nan
        if maps.walk_speed is not None:
            maps.walk_speed[~measured] = np.nan
        if maps.walk_speed_w is not None:
            maps.walk_speed_w[:, ~measured] = np.nan
        maps.interval_cv[~measured] = np.nan
    amp = np.nan_to_num(maps.amplitude, nan=0.0)
    # small low-amplitude holes (spiral cores oscillate weakly) stay inside the signal
    lam = maps.speed[0] * maps.period[0]
    wl_guess = float(np.nanmedian(lam)) if np.isfinite(lam).any() else float("nan")  # no speed: no guess
    hole = int(max(64, (0.5 * wl_guess) ** 2)) if np.isfinite(wl_guess) else 64
    filled = preprocess.signal_mask(amp, threshold=options.min_amplitude, min_size_px=hole) & in_field & covered
    # a wave that beats red noise; a spiral core's weak centre inside it counts
    sig_ok = (fill_holes_smaller_than(np.asarray(significant, bool), hole) if significant is not None
              else np.ones((nyb, nxb), dtype=bool))
    filled &= sig_ok
    # cores are found where directions are (small holes bridged), not within the edge's margin
    tracks = _detect_and_track(maps.charges, signal=plaquettes_inside(filled & walkable), n_frames=usable,
                               period_frames=period0, frame_ok=frame_ok, offsets=maps.charge_offsets)
    persistent = tracking.persistent_tracks(
        tracks, min_lifetime_frames=max(1, int(round(options.persistent_periods * period0)))
    )
    # holes without a core are places without signal (obstacles, empty patches): out
    valid = _signal_without_empty_holes(amp, filled, options, persistent.tracks) & covered & sig_ok
    valid_field = valid & in_field  # territories fill the whole cell field (margin: nearest territory)
    valid = valid & measured

    # speeds only where the direction is steady and away from persistent cores
    lam = np.where(valid, lam, np.nan)
    wl_px = float(np.nanmedian(lam)) if np.isfinite(lam).any() else float("nan")
    # ... and where the smoothing kernel saw signal all round (no dead patch, no second territory)
    # (outside the cell field the smoothing saw nothing: normalised convolution, not a dead patch)
    amp_seen = amp if in_field.all() else np.where(in_field, amp, np.inf)
    speed_ok = valid & (maps.coherence[0] >= options.min_coherence) & kernel_saw_signal(amp_seen, sigma_px=sigma_px)
    per = persistent.tracks
    if len(per["track_id"]):
        rr, cc = np.mgrid[0:nyb, 0:nxb]
        rad = 0.5 * wl_px if np.isfinite(wl_px) else 5.0
        for r, c in zip(per["mean_row"], per["mean_col"], strict=True):
            speed_ok &= np.hypot(rr - r, cc - c) > rad
    # centres closer than a quarter wavelength are one
    merge_px = max(2.0, 0.25 * wl_px) if np.isfinite(wl_px) else 3.0
    cs = track_centres(
        maps.direction,
        maps.coherence,
        valid_field,
        merge_radius_px=merge_px,
        min_coherence=options.min_coherence,
        cores_rows=per["mean_row"],
        cores_cols=per["mean_col"],
        cores_ids=per["track_id"],
        # no data: the border a drift correction leaves, edge pixels the streaming-texture removal
        # zeroed (amplitude exactly 0); given to the nearest territory, never measured
        fill=in_field & (~covered | (amp == 0)),
        workers=int(options.workers),
    )
    cs = without_hole_echoes(cs, holey, margin_px=margin_px, merge_px=merge_px, wl_px=wl_px, min_hole_px=small)
    cs = without_tiny_territories(cs, wl_px=wl_px)
    cs = without_edge_entries(cs, maps.direction[0], valid_field, wl_px=wl_px, edge_px=merge_px)
    speed_ok &= kernel_in_one_territory(cs.labels, sigma_px=sigma_px)
    for lab_w in cs.window_labels:  # a collision line that sweeps: out wherever it passed
        speed_ok &= kernel_in_one_territory(lab_w, sigma_px=sigma_px)
    # a source is the apex of a conical arrival surface: the kernel averages its two sides
    kernel_px = speed_regions.kernel_margin_px(sigma_px)
    speed_ok &= speed_regions.away_from_points((nyb, nxb), cs.centres["row"], cs.centres["col"], kernel_px)

    to_um_per_min = px_b / dt_min
    period_map = np.where(valid, maps.period[0] * dt_min, np.nan).astype(np.float32)
    phase_speed_map = np.where(speed_ok, maps.speed[0] * to_um_per_min, np.nan).astype(np.float32)
    wavelength_map = (phase_speed_map * period_map).astype(np.float32)
    # the primary front speed: each wave's own local plane fit, the median over waves
    speed_map = np.where(speed_ok, maps.fit_speed * to_um_per_min, np.nan).astype(np.float32)
    # a third: each front followed along its normal (waves.measure.displacement)
    walk_map = (np.where(speed_ok, maps.walk_speed * to_um_per_min, np.nan).astype(np.float32)
                if maps.walk_speed is not None else np.full((nyb, nxb), np.nan, np.float32))
    plane = speed_regions.plane_like(maps.direction[0], wavelength_px=wl_px)
    direction_map = np.where(speed_ok, np.rad2deg(maps.direction[0]), np.nan).astype(np.float32)

    # period time course and dispersion points (per window, per region of a 3 x 3 grid)
    course = []
    disp = {k: [] for k in ("window", "t_min", "region", "period_min", "speed_um_per_min", "n_pixels")}
    nreg = 3
    region = (np.minimum(np.arange(nyb) * nreg // nyb, nreg - 1)[:, None] * nreg
              + np.minimum(np.arange(nxb) * nreg // nxb, nreg - 1)[None, :])
    period_w = np.full((len(windows), nyb, nxb), np.nan, np.float32)  # per window, for the intervals
    speed_w = np.full((len(windows), nyb, nxb), np.nan, np.float32)
    fit_w = np.full((len(windows), nyb, nxb), np.nan, np.float32)
    walk_w = np.full((len(windows), nyb, nxb), np.nan, np.float32)
    for i, (w0, w1) in enumerate(windows):
        t_mid = (trim + 0.5 * (w0 + w1)) * dt_min
        pw = np.where(valid, maps.period[i + 1], np.nan)
        period_w[i] = pw
        q = quartiles(pw * dt_min)
        if q is not None:
            course.append({"t_min": float(t_mid), "period_min": q["median"], "q25": q["q25"], "q75": q["q75"]})
        ok = (speed_ok & (maps.coherence[i + 1] >= options.min_coherence) & np.isfinite(pw)
              & np.isfinite(maps.speed[i + 1]) & kernel_in_one_territory(cs.window_labels[i], sigma_px=sigma_px))
        speed_w[i] = np.where(ok, maps.speed[i + 1], np.nan)
        if maps.fit_speed_w is not None:
            fit_w[i] = np.where(ok, maps.fit_speed_w[i], np.nan)
        if maps.walk_speed_w is not None:
            walk_w[i] = np.where(ok, maps.walk_speed_w[i], np.nan)
        for g in range(nreg * nreg):
            m = ok & plane & (region == g)  # plane-wave-like fronts only: comparable with a dispersion relation
            if m.sum() < 10:
                continue
            disp["window"].append(i)
            disp["t_min"].append(t_mid)
            disp["region"].append(g)
            disp["period_min"].append(float(np.median(pw[m])) * dt_min)
            disp["speed_um_per_min"].append(float(np.median(maps.speed[i + 1][m])) * to_um_per_min)
            disp["n_pixels"].append(int(m.sum()))
    dtypes = {"window": np.int64, "t_min": np.float64, "region": np.int64, "period_min": np.float64,
              "speed_um_per_min": np.float64, "n_pixels": np.int64}
    dispersion = {k: np.asarray(v, dtype=dtypes[k]) for k, v in disp.items()}

    px = cal.pixel_size_um
    dt_s = cal.frame_interval_s
    cores_rec = _to_recorded(tracks.cores, factor=factor, frame_offset=trim)
    tracks_rec = _to_recorded(tracks.tracks, factor=factor, frame_offset=trim)
    pers_rec = _to_recorded(persistent.tracks, factor=factor, frame_offset=trim)
    cores_um = tracking.cores_in_um(cores_rec, pixel_size_um=px, frame_interval_s=dt_s)
    tracks_um = tracking.tracks_in_um(tracks_rec, pixel_size_um=px, frame_interval_s=dt_s)
    spiral_cores = tracking.spiral_core_records(pers_rec, pixel_size_um=px, frame_interval_s=dt_s)
    field_px = float(valid.sum())
    density = (
        tracking.cores_per_cm2(len(per["track_id"]), field_area_px=field_px, pixel_size_um=px_b)
        if field_px > 0 else None
    )
    if not valid.any():
        warnings.append("no pixel carries a signal above the amplitude floor")
    period_q, speed_q, phase_q = quartiles(period_map), quartiles(speed_map), quartiles(phase_speed_map)
    walk_q = quartiles(walk_map)
    if speed_q is None and period_q is not None:
        warnings.append("front speed not measured: no pixel has a steady wave direction away from cores and collisions")
    grid = _grid(cal, factor)
    centres, centres_tab, terr_course = _centre_records(
        cs, maps=maps, valid=valid_field, windows=windows, trim=trim, factor=factor, cal=cal, merge_px=merge_px,
        spiral_cores=spiral_cores, frame_ok=frame_ok,
    )
    conf = confidence.headline(period_w=period_w, speed_w=speed_w,
                               block=confidence.block_px(wavelength_px=wl_px, sigma_px=sigma_px),
                               dt_min=dt_min, to_um_per_min=to_um_per_min, px_um=px_b,
                               speed_key="front_speed_phase_velocity_um_per_min",
                               more={"front_speed_um_per_min": (fit_w, to_um_per_min),
                                     "front_speed_displacement_um_per_min": (walk_w, to_um_per_min)})
    for second, key, label in ((phase_q, "front_speed_phase_velocity_um_per_min", "phase velocity"),
                               (walk_q, "front_speed_displacement_um_per_min", "front displacement")):
        clash = speed_regions.disagreement(speed_q, second, conf, "front_speed_um_per_min", key, label=label)
        if clash:
            warnings.append(clash)
    by_territory, by_distance = speed_regions.territory_speeds(
        speed_map, cs.labels, centres, grid=grid, bin_um=confidence.block_px(wavelength_px=wl_px, sigma_px=sigma_px)
        * px_b / 2.0)
    conf["spiral_cores"] = confidence.cores(spiral_cores, tracking.tracks_in_um(
        pers_rec, pixel_size_um=px, frame_interval_s=dt_s))
    conf["centres"] = confidence.territories(centres, terr_course)
    summary = {
        "schema_version": 1,
        "source": None,  # filled by the caller that knows the file
        "calibration": cal.to_dict(),
        "period_min": period_q,
        "front_speed_um_per_min": speed_q,
        "wavelength_um": quartiles(wavelength_map),
        "period_timecourse": [{"t_min": c["t_min"], "period_min": c["period_min"]} for c in course],
        "spiral_cores": spiral_cores,
        "centres": centres,
        "warnings": list(warnings),
        # extra keys
        "confidence": conf,
        "centres_per_cm2": (len(centres) / (field_px * px_b * px_b * 1e-8)) if field_px > 0 else None,
        # candidates that did not earn a place among the centres, with the reason (not counted above)
        "rejected_centres": [
            {"kind": k, "x_um": float(x), "y_um": float(y), "reason": r}
            for k, x, y, r in zip(*(_rejected_table(cs.rejected, factor=factor, px=cal.pixel_size_um)[c]
                                    for c in ("kind", "x_um", "y_um", "reason")), strict=True)
        ],
        "unassigned_share": (
            float(np.sum(valid & (cs.labels == 0)) / field_px) if field_px > 0 else None
        ),
        "front_speed_method": "per-wave fits: a local plane through each wave's arrival times (Bayly et al. 1998)",
        "front_speed_phase_velocity_um_per_min": phase_q,
        "front_speed_displacement_um_per_min": walk_q,
        "front_speed_by_territory": by_territory,
        "speed_regions": {
            "collision_margin_um": kernel_px * px_b,
            "centre_margin_um": kernel_px * px_b,
            "core_margin_um": (0.5 * wl_px if np.isfinite(wl_px) else 5.0) * px_b,
            "edge_margin_um": float(margin_px * px_b),
            "sweeping_collision_lines": "out wherever a window's collision line passed",
            "plane_wave_like": f"|front curvature| x wavelength <= {speed_regions.PLANE_KAPPA_WAVELENGTH:g} "
                               "(dispersion points only)",
            "plane_wave_like_fraction": float(np.mean(plane[speed_ok])) if speed_ok.any() else None,
        },
        "cores_per_cm2": density,
        "dominant_period_min": period0 * dt_min,
        "analysis": {
            "waves_version": __version__,
            "options": _options_dict(options),
            "grid": grid,
            "passband_period_min": [dt_min / passband[1], dt_min / passband[0]],
            "trimmed_frames_each_end": trim,
            "phase_method": options.phase_method,
            "delay_lag_frames": lag,
            "window_min": (windows[0][1] - windows[0][0]) * dt_min if windows else None,
            "window_step_min": (windows[1][0] - windows[0][0]) * dt_min if len(windows) > 1 else None,
            "window_centres_min": [(trim + 0.5 * (a + b)) * dt_min for a, b in windows],
            "smoothing_sigma_um": sigma_px * px_b,
            "signal_fraction": float(valid.mean()),
            "notes": notes,
        },
        "disclaimer": DISCLAIMER,
    }
    out_maps = {
        "period_min": period_map,
        "front_speed_um_per_min": speed_map,
        "wavelength_um": wavelength_map,
        "front_speed_phase_velocity_um_per_min": phase_speed_map,
        "front_speed_displacement_um_per_min": walk_map,
        "plane_wave_like": (plane & speed_ok).astype(np.uint8),
        "direction_deg": direction_map,
        "territory_labels": cs.labels.astype(np.int32),
        "interval_cv": np.where(valid, maps.interval_cv, np.nan).astype(np.float32),
        "amplitude": maps.amplitude,
        "signal_to_noise": maps.snr if maps.snr is not None else np.full((nyb, nxb), np.nan, np.float32),
        "mean_image": mean_b,
        "covered": covered,
    }
    if cells is not None:
        from waves.analyse.field import notes_for, summary_block

        block = summary_block(cells, factor=factor, margin_um=margin_px * px_b if not measured.all() else 0.0,
                              measured=measured)
        summary["cell_field"] = block
        notes.extend(notes_for(block))
        out_maps["cell_mask"] = cells.mask.astype(np.uint8)
    course_tab = {
        "t_min": np.asarray([c["t_min"] for c in course], dtype=np.float64),
        "period_min": np.asarray([c["period_min"] for c in course], dtype=np.float64),
        "period_q25_min": np.asarray([c["q25"] for c in course], dtype=np.float64),
        "period_q75_min": np.asarray([c["q75"] for c in course], dtype=np.float64),
    }
    tables = {
        "cores_per_frame": cores_um,
        "core_tracks": tracks_um,
        "period_timecourse": course_tab,
        "dispersion": dispersion,
        "centres": centres_tab,
        "rejected_centres": _rejected_table(cs.rejected, factor=factor, px=cal.pixel_size_um),
        "territories_timecourse": terr_course,
        "speed_by_distance": by_distance,
    }
    stacks = {"territory_labels_windows": cs.window_labels}
    return summary, out_maps, tables, stacks


def _centre_records(cs, *, maps, valid, windows, trim, factor, cal, merge_px, spiral_cores, frame_ok=None):
    """summary['centres'], the centres table and the per-window territory
    table, in calibrated units and recorded-image coordinates."""
    px = cal.pixel_size_um
    px_b = px * factor
    dt_min = cal.frame_interval_min
    nyb, nxb = valid.shape
    rr, cc = np.mgrid[0:nyb, 0:nxb]
    # the shares' field: what the territories partition (the measured pixels and the
    # unmeasured border strips given to the nearest territory), so that shares add up to <= 1
    shared = valid | (cs.labels > 0)
    if len(cs.window_labels):
        shared = shared | (cs.window_labels > 0).any(axis=0)
    field_px = max(float(shared.sum()), 1.0)
    area_mm2 = px_b * px_b * 1e-6
    core_by_track = {c["id"]: c for c in spiral_cores}
    arrivals = arrival_field(maps.arrivals, valid.shape)

    def window_min(w, end):
        if w < 0:
            return None
        a, b = windows[w]
        return float((trim + (b if end else a)) * dt_min)

    records = []
    tab = {k: [] for k in ("id", "kind", "x_um", "y_um", "charge", "rotation", "period_min", "interval_cv",
                           "territory_area_mm2", "equivalent_diameter_um", "field_share", "first_min",
                           "last_min")}
    c = cs.centres
    for i in range(len(c["id"])):
        r, col = c["row"][i], c["col"][i]
        near = valid & (np.hypot(rr - r, cc - col) <= merge_px)
        with warnings_module.catch_warnings():
            warnings_module.simplefilter("ignore", RuntimeWarning)
            period = float(np.nanmedian(maps.period[0][near])) * dt_min if near.any() else float("nan")
            cv = float(np.nanmedian(maps.interval_cv[near])) if near.any() else float("nan")
        # from the waves the centre emitted itself (not those that entrain it later)
        own = np.zeros(0)
        if np.isfinite(period):
            own = np.concatenate([  # within each valid stretch: no interval across a gap
                emission_intervals(part, r, col, radius_px=merge_px, max_lag_frames=0.5 * period / dt_min)
                for part in arrivals_by_stretch(arrivals, frame_ok)
            ])
        whole = c["first_window"][i] <= 0 and c["last_window"][i] in (-1, len(windows) - 1)
        if len(own):
            period = float(np.mean(own)) * dt_min  # = (last - first) / n over runs of own waves
            cv = float(np.std(own) / np.mean(own)) if len(own) >= 2 else float("nan")
        elif c["kind"][i] == "target" and not whole:
            period = cv = float("nan")  # a source for part of the movie; no own interval seen
        n = int(c["n_pixels"][i])
        area = n * area_mm2
        core = core_by_track.get(int(c["core_track"][i]))
        x_um = (col * factor + 0.5 * (factor - 1)) * px
        y_um = (r * factor + 0.5 * (factor - 1)) * px
        if core is not None:
            x_um, y_um = core["x_um"], core["y_um"]
        rec = {
            "id": int(c["id"][i]),
            "kind": str(c["kind"][i]),
            "x_um": float(x_um),
            "y_um": float(y_um),
            "period_min": period if np.isfinite(period) else None,
            "territory_area_mm2": float(area),
            # extra keys
            "equivalent_diameter_um": float(2e3 * np.sqrt(area / np.pi)),
            "field_share": float(n / field_px),
            "interval_cv": cv if np.isfinite(cv) else None,
            "charge": None if core is None else core["charge"],
            "rotation": None if core is None else core["rotation"],
            "first_min": window_min(int(c["first_window"][i]), False),
            "last_min": window_min(int(c["last_window"][i]), True),
        }
        records.append(rec)
        for k in tab:
            tab[k].append(rec[k])
    dtypes = {"id": np.int64, "kind": object, "rotation": object}
    centres_tab = {
        k: np.asarray([np.nan if v is None else v for v in vals] if k not in dtypes else
                      ["" if v is None else v for v in vals], dtype=dtypes.get(k, np.float64))
        for k, vals in tab.items()
    }
    centres_tab["charge"] = np.asarray([0 if v is None else v for v in tab["charge"]], dtype=np.int64)
    wa = cs.window_areas
    t_mid = np.asarray([(trim + 0.5 * (windows[w][0] + windows[w][1])) * dt_min for w in wa["window"]],
                       dtype=np.float64)
    course = {
        "window": wa["window"],
        "t_min": t_mid,
        "centre_id": wa["centre_id"],
        "territory_area_mm2": wa["n_pixels"].astype(np.float64) * area_mm2,
        "field_share": wa["n_pixels"].astype(np.float64) / field_px,
    }
    return records, centres_tab, course


def _options_dict(options: AnalysisOptions) -> dict:
    d = asdict(options)
    d["period_band_min"] = list(options.period_band_min)
    return d


def _empty_result(cal, options, warnings, notes, sigma_um, mean_b, grid, timings, t_start) -> Analysis:
    summary = {
        "schema_version": 1,
        "source": None,
        "calibration": cal.to_dict(),
        "period_min": None,
        "front_speed_um_per_min": None,
        "wavelength_um": None,
        "period_timecourse": [],
        "spiral_cores": [],
        "centres": [],
        "warnings": list(warnings),
        "analysis": {
            "waves_version": __version__,
            "options": _options_dict(options),
            "grid": grid,
            "smoothing_sigma_um": sigma_um,
            "notes": notes,
        },
        "disclaimer": DISCLAIMER,
    }
    timings["total_s"] = time.perf_counter() - t_start
    return Analysis(summary=summary, maps={"mean_image": mean_b}, tables={}, warnings=tuple(warnings),
                    timings_s=timings)
