"""Figure functions on synthetic fields with known truth, and the phase
recomputed for the pictures against the synthetic phase."""

import hashlib
import math

import numpy as np
import pytest
from matplotlib.figure import Figure

from waves import synthetic as S
from waves.errors import InputError
from waves.render import DarkfieldStyle
from waves.report import figures as F
from waves.report.signal import line_pixels, recompute_phase

PX_UM = 20.0
DT_S = 20.0


def _render(fig: Figure) -> None:
    fig.draw_without_rendering()


def _texts(fig: Figure) -> str:
    return " ".join(t.get_text() for ax in fig.axes for t in ax.texts)


def _gid(ax, gid):
    return [a for a in ax.get_children() if getattr(a, "get_gid", lambda: None)() == gid]


def _signed_area_display(ax, xy_data: np.ndarray) -> float:
    """Shoelace area of a polygon after the data -> display transform (display
    y grows upward, so counterclockwise on screen is positive)."""
    d = ax.transData.transform(xy_data)
    x, y = d[:, 0], d[:, 1]
    return 0.5 * float(np.sum(x * np.roll(y, -1) - np.roll(x, -1) * y))


@pytest.fixture(scope="module")
def spiral_pair():
    # truth: two spirals of charge +1 and -1 (waves.synthetic phase convention)
    phase, truth = S.phase_field(
        (3, 80, 100), pixel_size_um=PX_UM, frame_interval_s=DT_S, speed_um_per_min=100.0,
        sources=[S.SpiralSource(600.0, 800.0, 6.0, charge=1), S.SpiralSource(1400.0, 800.0, 6.0, charge=-1)],
    )
    return phase, truth


def test_map_grid_extent_follows_the_pixel_convention():
    # DESIGN.md: x_um = col * pixel_size_um at pixel centres, so edges sit half a pixel beyond
    g = F.MapGrid(100.0, origin_x_um=37.5, origin_y_um=12.5)
    left, right, bottom, top = g.extent_mm((30, 50))
    assert left == pytest.approx((37.5 - 50.0) / 1000)
    assert right == pytest.approx((37.5 + 49 * 100 + 50.0) / 1000)
    assert top == pytest.approx((12.5 - 50.0) / 1000)
    assert bottom == pytest.approx((12.5 + 29 * 100 + 50.0) / 1000)
    assert g.x_mm(3) == pytest.approx(0.3375)
    with pytest.raises(InputError, match="pixel size"):
        F.MapGrid(0.0)
    s = {"calibration": {"pixel_size_um": 25.0},
         "analysis": {"grid": {"bin": 4, "pixel_size_um": 100.0, "origin_x_um": 37.5, "origin_y_um": 37.5}}}
    assert F.MapGrid.from_summary(s) == F.MapGrid(100.0, 37.5, 37.5)
    assert F.MapGrid.from_summary({"calibration": {"pixel_size_um": 25.0}}) == F.MapGrid(25.0)


@pytest.mark.parametrize("width, expected", [(5.6, 1.0), (3.2, 0.5), (12.0, 2.0), (0.9, 0.1), (30.0, 5.0)])
def test_scale_bar_length_is_a_round_fifth(width, expected):
    # common practice, no source: a 1-2-5 round length no longer than a fifth of the field
    assert F.nice_scale_length_mm(width) == pytest.approx(expected)


def test_phase_snapshot_orientation_and_rotation_marks(spiral_pair):
    phase, truth = spiral_pair
    grid = F.MapGrid(PX_UM)
    cores = [{"x_um": c.x_um, "y_um": c.y_um, "charge": c.charge} for c in truth.cores]
    fig = F.phase_snapshot_figure(phase[1], grid=grid, cores=cores, t_min=truth.t_min[1])
    _render(fig)
    ax = fig.axes[0]
    (im,) = ax.images
    assert im.get_cmap().name.startswith("twilight")
    assert "mm" in ax.get_xlabel() and "mm" in ax.get_ylabel()
    np.testing.assert_allclose(im.get_array(), phase[1], atol=1e-6)
    for core in truth.cores:
        # walk a circle counterclockwise ON SCREEN around the true core, read the
        # displayed image under each point: the winding must be the core's charge
        # (truth: waves.synthetic, charge counted counterclockwise as displayed)
        centre = ax.transData.transform([(core.x_um / 1000, core.y_um / 1000)])[0]
        rad_px = 0.25 * (ax.transData.transform([(0.2, 0)])[0][0] - ax.transData.transform([(0, 0)])[0][0])
        a = np.linspace(0, 2 * np.pi, 73)
        disp = np.column_stack([centre[0] + rad_px * np.cos(a), centre[1] + rad_px * np.sin(a)])
        data = ax.transData.inverted().transform(disp)
        left, right, bottom, top = im.get_extent()
        cols = np.floor((data[:, 0] - left) / (right - left) * phase.shape[2]).astype(int)
        rows = np.floor((data[:, 1] - top) / (bottom - top) * phase.shape[1]).astype(int)
        vals = np.asarray(im.get_array())[rows, cols]
        winding = np.sum(np.angle(np.exp(1j * np.diff(vals)))) / (2 * np.pi)
        assert round(winding) == core.charge
    # rotation marks: charge +1 turns clockwise as displayed (negative display area), -1 counterclockwise
    cw = _gid(ax, "rotation-clockwise")
    ccw = _gid(ax, "rotation-counterclockwise")
    assert len(cw) == 1 and len(ccw) == 1
    assert _signed_area_display(ax, cw[0].get_xydata()) < 0
    assert _signed_area_display(ax, ccw[0].get_xydata()) > 0
    # each mark is centred on its core (truth positions)
    for line, core in ((cw[0], truth.cores[0]), (ccw[0], truth.cores[1])):
        xy = line.get_xydata()
        r = np.hypot(xy[:, 0] - core.x_um / 1000, xy[:, 1] - core.y_um / 1000)
        assert np.ptp(r) < 1e-9


def test_phase_snapshot_without_cores_says_so(spiral_pair):
    fig = F.phase_snapshot_figure(spiral_pair[0][0], grid=F.MapGrid(PX_UM))
    assert "no spiral cores" in _texts(fig)
    fig = F.phase_snapshot_figure(np.full((8, 8), np.nan), grid=F.MapGrid(PX_UM))
    assert "no phase" in _texts(fig)


def test_speed_map_arrows_point_the_way_waves_travel():
    # truth: a plane wave travelling at 30 degrees counterclockwise from +x as displayed
    # (waves.synthetic.PlanarSource convention); its direction map is the constant 30
    speed = np.full((40, 60), 100.0)
    speed[:5, :5] = np.nan
    direction = np.full((40, 60), 30.0)
    fig = F.speed_map_figure(speed, direction, grid=F.MapGrid(50.0))
    _render(fig)
    ax = fig.axes[0]
    (im,) = ax.images
    assert im.get_cmap().name.startswith("viridis")
    (q,) = [c for c in ax.collections if c.get_gid() == "direction-arrows"]
    p0 = q.get_offsets()[0]
    tip = p0 + 0.01 * np.array([q.U[0], q.V[0]])
    d = ax.transData.transform([p0, tip])
    angle = math.degrees(math.atan2(d[1, 1] - d[0, 1], d[1, 0] - d[0, 0]))
    assert angle == pytest.approx(30.0, abs=0.5)
    cbar_label = fig.axes[1].get_ylabel()
    assert "um/min" in cbar_label
    with pytest.raises(InputError, match="shape"):
        F.speed_map_figure(speed, direction[:10], grid=F.MapGrid(50.0))


def test_period_map_colours_and_missing_values():
    period = np.linspace(5.0, 7.0, 30 * 40).reshape(30, 40)
    period[10:12, 10:12] = np.nan
    fig = F.period_map_figure(period, grid=F.MapGrid(25.0))
    ax = fig.axes[0]
    (im,) = ax.images
    assert im.get_cmap().name.startswith("cividis")
    assert np.ma.is_masked(im.get_array()) and im.get_array().mask[10, 10]
    assert "min" in fig.axes[1].get_ylabel()
    # scale bar: black line whose length is the label's, about a fifth of the 1 mm wide field
    (bar,) = _gid(ax, "scale-bar")
    length = np.ptp(bar.get_xdata())
    assert length == pytest.approx(F.nice_scale_length_mm(1.0))
    assert any(t.get_text() == f"{length * 1000:g} um" for t in ax.texts)
    fig = F.period_map_figure(np.full((5, 5), np.nan), grid=F.MapGrid(25.0))
    assert "no period" in _texts(fig)
    fig = F.regularity_map_figure(np.full((6, 8), 0.05), grid=F.MapGrid(25.0))
    (im,) = fig.axes[0].images
    assert im.get_cmap().name.startswith("magma")
    np.testing.assert_array_equal(im.get_array(), np.full((6, 8), 0.05))


def test_histograms_mark_median_and_quartiles(rng):
    period = rng.normal(6.0, 0.5, size=(50, 50))
    speed = rng.gamma(4.0, 80.0, size=(50, 50))
    speed[0, :10] = np.nan
    fig = F.histograms_figure(period, speed)
    for ax, values in zip(fig.axes, (period.ravel(), speed[np.isfinite(speed)]), strict=True):
        # numpy's percentile is the reference
        q25, med, q75 = np.percentile(values, [25, 50, 75])
        assert _gid(ax, "median")[0].get_xdata()[0] == pytest.approx(med)
        assert _gid(ax, "q25")[0].get_xdata()[0] == pytest.approx(q25)
        assert _gid(ax, "q75")[0].get_xdata()[0] == pytest.approx(q75)
        assert ax.get_legend().get_title().get_text() == f"n = {values.size}"
    assert "um/min" in fig.axes[1].get_xlabel()
    fig = F.histograms_figure(np.zeros(0), np.full(4, np.nan))
    assert "no period measured" in _texts(fig) and "no speed measured" in _texts(fig)


def legend_colour(ax, k):
    from matplotlib.colors import to_hex

    return to_hex(ax.get_legend().legend_handles[k].get_color())


def test_territory_map_areas_match_the_synthetic_truth():
    # truth: waves.synthetic competing targets, their territories and areas per frame
    _, truth = S.phase_field(
        (2, 60, 80), pixel_size_um=PX_UM, frame_interval_s=DT_S, speed_um_per_min=100.0,
        sources=[S.TargetSource(300.0, 400.0, 6.0), S.TargetSource(1200.0, 700.0, 6.0)],
    )
    labels = truth.labels_first.astype(np.int64) + 1  # 0 = none, so sources are 1 and 2
    centres = [{"id": i + 1, "kind": "target", "x_um": s.x_um, "y_um": s.y_um} for i, s in enumerate(truth.sources)]
    fig = F.territory_map_figure(labels, grid=F.MapGrid(PX_UM), centres=centres)
    ax = fig.axes[0]
    legend = [t.get_text() for t in ax.get_legend().get_texts()]
    for i, area in enumerate(truth.territory_area_mm2[0]):
        assert legend[i] == f"centre {i + 1}: {area:.2f} mm\u00b2"
    marks = _gid(ax, "centre")
    assert [tuple(m.get_xydata()[0]) for m in marks] == [(c["x_um"] / 1000, c["y_um"] / 1000) for c in centres]
    # territory areas over time: one line per centre holding the truth's areas per frame
    t = np.repeat(truth.t_min, 2)
    ids = np.tile([1, 2], truth.t_min.size)
    fig = F.territory_timecourse_figure(t, ids, truth.territory_area_mm2.ravel())
    for i in (1, 2):
        (line,) = _gid(fig.axes[0], f"territory-{i}")
        np.testing.assert_allclose(line.get_ydata(), truth.territory_area_mm2[:, i - 1])
        assert line.get_color().lower() == F.centre_colour(i).lower() == legend_colour(ax, i - 1)
    assert "no territory time course" in _texts(F.territory_timecourse_figure([], [], []))
    fig = F.territory_map_figure(None, grid=F.MapGrid(PX_UM))
    assert "territories not measured" in _texts(fig)
    fig = F.territory_map_figure(np.zeros((5, 5), int), grid=F.MapGrid(PX_UM))
    assert "unassigned" in _texts(fig)


def test_mean_image_marks_centres_and_says_when_there_are_none():
    img = np.arange(20 * 30, dtype=float).reshape(20, 30)
    centres = [{"id": 3, "kind": "spiral", "x_um": 250.0, "y_um": 120.0}]
    fig = F.mean_image_figure(img, grid=F.MapGrid(20.0), centres=centres)
    (mark,) = _gid(fig.axes[0], "centre")
    assert tuple(mark.get_xydata()[0]) == (0.25, 0.12)
    fig = F.mean_image_figure(img, grid=F.MapGrid(20.0))
    assert "no centres" in _texts(fig)
    with pytest.raises(InputError, match="x_um"):
        F.mean_image_figure(img, grid=F.MapGrid(20.0), centres=[{"x": 1}])


def test_period_timecourse_and_dispersion_show_their_data():
    t = np.array([10.0, 20.0, 30.0])
    p = np.array([7.0, 6.5, 6.0])
    fig = F.period_timecourse_figure(t, p, q25_min=p - 0.2, q75_min=p + 0.3)
    (line,) = _gid(fig.axes[0], "period-median")
    np.testing.assert_array_equal(line.get_xdata(), t)
    np.testing.assert_array_equal(line.get_ydata(), p)
    assert "no period time course" in _texts(F.period_timecourse_figure([], []))
    with pytest.raises(InputError, match="length"):
        F.period_timecourse_figure([1.0], [1.0, 2.0])
    fig = F.dispersion_figure(p, [300.0, 280.0, 250.0], t_min=t)
    (pts,) = [c for c in fig.axes[0].collections if c.get_gid() == "dispersion-points"]
    np.testing.assert_array_equal(pts.get_offsets(), np.column_stack([p, [300.0, 280.0, 250.0]]))
    assert "no dispersion points" in _texts(F.dispersion_figure([], []))


def test_kymograph_axes_are_time_and_distance():
    k = np.random.default_rng(1).normal(size=(30, 40))
    t = 6.0 + np.arange(30) * 0.5
    s = np.arange(40) * 0.1
    fig = F.kymograph_figure(k, t_min=t, distance_mm=s)
    (im,) = fig.axes[0].images
    left, right, bottom, top = im.get_extent()
    assert (left, right) == pytest.approx((-0.05, 3.95))
    assert (top, bottom) == pytest.approx((5.75, 20.75))  # time runs down
    assert "mm" in fig.axes[0].get_xlabel() and "min" in fig.axes[0].get_ylabel()
    assert "does not match" in _texts(F.kymograph_figure(k[:, :5], t_min=t, distance_mm=s))
    assert "not available" in _texts(F.kymograph_figure(np.zeros((0, 0)), t_min=[], distance_mm=[]))


def test_core_tracks_follow_the_table():
    # a core drifting along a known straight path, as strings (a CSV read back)
    frames = np.arange(10)
    x = 500.0 + 10.0 * frames
    y = 800.0 - 5.0 * frames
    table = {"frame": [str(f) for f in frames], "track_id": ["0"] * 10, "x_um": [repr(float(v)) for v in x],
             "y_um": [repr(float(v)) for v in y], "charge": ["1"] * 10}
    fig = F.core_tracks_figure(table, grid=F.MapGrid(20.0), shape_yx=(60, 60), persistent_ids=[0])
    (line,) = _gid(fig.axes[0], "track-0")
    np.testing.assert_allclose(line.get_xdata(), x / 1000)
    np.testing.assert_allclose(line.get_ydata(), y / 1000)
    assert line.get_color() == F.CHARGE_COLOURS[1]
    empty = {k: [] for k in table}
    assert "no spiral cores detected" in _texts(F.core_tracks_figure(empty, grid=F.MapGrid(20.0), shape_yx=(9, 9)))
    with pytest.raises(InputError, match="lacks"):
        F.core_tracks_figure({"frame": []}, grid=F.MapGrid(20.0), shape_yx=(9, 9))


# --------------------------------------------------------------------------- recomputed phase


@pytest.fixture(scope="module")
def planar_stack(tmp_path_factory):
    """A dark-field movie of a plane wave travelling in +x, its truth phase
    and an ImageJ file of it (tifffile writes it, the reference writer)."""
    import tifffile

    shape = (120, 40, 64)
    kwargs = dict(pixel_size_um=PX_UM, frame_interval_s=DT_S, speed_um_per_min=100.0)
    src = [S.PlanarSource(0.0, 6.0)]
    movie = S.synthetic_movie(shape, sources=src, style=DarkfieldStyle(noise=0.01), seed=3, **kwargs)
    phase, _ = S.phase_field(shape, sources=src, **kwargs)
    path = tmp_path_factory.mktemp("planar") / "planar.tif"
    tifffile.imwrite(path, movie.data, imagej=True, resolution=(1 / PX_UM, 1 / PX_UM),
                     metadata={"axes": "TYX", "unit": "um", "finterval": DT_S})
    return path, phase


def _summary(path, shape):
    return {
        "source": {"path": str(path), "sha256": hashlib.sha256(path.read_bytes()).hexdigest(),
                   "shape_tyx": list(shape)},
        "calibration": {"pixel_size_um": PX_UM, "frame_interval_s": DT_S},
        "analysis": {"grid": {"bin": 1, "pixel_size_um": PX_UM, "origin_x_um": 0.0, "origin_y_um": 0.0},
                     "passband_period_min": [3.0, 12.0], "trimmed_frames_each_end": 10,
                     "smoothing_sigma_um": 0.0, "options": {"flatten": False}},
        "spiral_cores": [], "centres": [],
    }


def test_recomputed_phase_matches_the_synthetic_phase(planar_stack):
    path, truth_phase = planar_stack
    pf = recompute_phase(path, _summary(path, truth_phase.shape), max_frames=20)
    assert pf.phase.shape == (20, 40, 64) and pf.frames.min() >= 10 and pf.frames.max() < 110
    np.testing.assert_allclose(pf.t_min, pf.frames * DT_S / 60)
    # the phase differs from the synthetic truth by one constant (the band
    # polarity and pulse shape), so the mean phase difference is coherent
    d = np.exp(1j * (pf.phase - truth_phase[pf.frames]))
    coherence = np.abs(d.mean())
    assert coherence > 0.95
    # kymograph: fronts cross two points 200 um apart 200/100 = 2 min = 6 frames apart
    # (truth: the synthetic speed 100 um/min, travelling towards +x)
    k = pf.kymograph
    a, b = k[:, 20] - k[:, 20].mean(), k[:, 30] - k[:, 30].mean()
    lags = np.arange(-15, 16)
    xc = [np.dot(a[max(0, -L): len(a) - max(0, L)], b[max(0, L): len(b) - max(0, -L)]) for L in lags]
    assert lags[int(np.argmax(xc))] == pytest.approx(6, abs=1)
    assert pf.distance_um[1] - pf.distance_um[0] == pytest.approx(PX_UM, rel=0.05)


def test_recompute_refuses_another_stack(planar_stack, tmp_path):
    path, truth_phase = planar_stack
    s = _summary(path, truth_phase.shape)
    s["source"]["sha256"] = "0" * 64
    with pytest.raises(InputError, match="not the stack that was analysed"):
        recompute_phase(path, s)
    with pytest.raises(InputError, match="not there"):
        recompute_phase(tmp_path / "gone.tif", _summary(path, truth_phase.shape))
    s = _summary(path, truth_phase.shape)
    del s["analysis"]["passband_period_min"]
    with pytest.raises(InputError, match="no passband"):
        recompute_phase(path, s)


def test_line_pixels_refuses_a_line_off_the_field():
    g = F.MapGrid(10.0)
    rows, cols, dist = line_pixels((0.0, 50.0, 90.0, 50.0), g, (10, 10))
    np.testing.assert_array_equal(rows, 5)
    np.testing.assert_array_equal(cols, np.arange(10))
    np.testing.assert_allclose(dist, np.arange(10) * 10.0)
    with pytest.raises(InputError, match="misses the field"):
        line_pixels((-500.0, -500.0, -400.0, -400.0), g, (10, 10))


# --------------------------------------------------------------------------- movie


def _phase_frames(phase, cores_frame=None):
    from waves.report.signal import PhaseFrames

    n = phase.shape[0]
    return PhaseFrames(
        frames=np.arange(n), t_min=np.arange(n) * DT_S / 60, phase=phase, signal=np.cos(phase).astype(np.float32),
        grid=F.MapGrid(PX_UM), line_um=(0.0, 0.0, 100.0, 0.0), kymograph=np.zeros((n, 2), np.float32),
        kymograph_t_min=np.arange(n) * DT_S / 60, distance_um=np.array([0.0, 20.0]), notes=(),
    )


def test_movie_gif_frames_size_and_limits(tmp_path):
    from matplotlib import animation
    from PIL import Image

    from waves.report.movie import MAX_MOVIE_FRAMES, _render_writer, cores_by_frame, write_movie

    # truth: a charge +1 spiral at (600, 800) um (waves.synthetic)
    phase, truth = S.phase_field((6, 60, 80), pixel_size_um=PX_UM, frame_interval_s=DT_S, speed_um_per_min=100.0,
                                 sources=[S.SpiralSource(600.0, 800.0, 6.0, charge=1)])
    cores = {"frame": ["0", "1"], "x_um": ["600.0", "600.0"], "y_um": ["800.0", "800.0"], "charge": ["1", "1"]}
    assert cores_by_frame(cores) == {0: [(600.0, 800.0, 1)], 1: [(600.0, 800.0, 1)]}
    pf = _phase_frames(phase)
    files = write_movie(pf, tmp_path, cores_per_frame=cores, mp4=False)
    assert files.mp4 is None and files.n_frames == 6
    with Image.open(files.gif) as im:  # Pillow, the reference decoder
        assert im.n_frames == 6 and im.size == (int(8 * files.dpi), int(4 * files.dpi))
        # 8 frames per second: 125 ms, stored in hundredths of a second (GIF89a specification)
        assert im.info["duration"] == 120
    # a byte limit the GIF exceeds makes it re-rendered smaller, down to 30 dpi
    big = files.gif.stat().st_size
    small = write_movie(pf, tmp_path, name="small", max_bytes=big // 4, mp4=False)
    assert small.dpi < files.dpi and small.gif.stat().st_size < big
    # the writer path (used for MP4 when ffmpeg exists) through a writer that is always there
    _render_writer(pf, cores_by_frame(cores), tmp_path / "w.gif", animation.PillowWriter(fps=4), dpi=40,
                   progress=False)
    with Image.open(tmp_path / "w.gif") as im:
        assert im.n_frames == 6
    too_many = _phase_frames(np.zeros((MAX_MOVIE_FRAMES + 1, 4, 4), np.float32))
    with pytest.raises(InputError, match="at most"):
        write_movie(too_many, tmp_path)
    with pytest.raises(InputError, match="not a folder"):
        write_movie(pf, tmp_path / "missing")
