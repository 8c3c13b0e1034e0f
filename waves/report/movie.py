"""Movie of an analysis: the processed signal beside the wave phase, spiral
cores marked, as an animated GIF (Pillow, no ffmpeg needed) and as MP4 when
an ffmpeg encoder is installed.

Frames come from `waves.report.signal.recompute_phase`; cores from the
cores_per_frame table (frame numbers of the analysed stack).  Files are
written atomically: a temporary file in the same folder, then os.replace.
Movies are kept small: at most 120 frames, and the GIF is re-rendered at a
lower resolution while it is larger than `max_bytes`.
"""

from __future__ import annotations

import math
import os
import pathlib
import tempfile
from collections.abc import Mapping
from dataclasses import dataclass

import numpy as np
from matplotlib.figure import Figure

from waves.errors import InputError
from waves.report.figures import CHARGE_COLOURS, PHASE_CMAP, _cmap, _scale_bar

__all__ = ["MovieFiles", "write_movie", "cores_by_frame", "MAX_MOVIE_FRAMES", "MAX_MOVIE_BYTES"]

MAX_MOVIE_FRAMES = 120
MAX_MOVIE_BYTES = 5_000_000


@dataclass(frozen=True)
class MovieFiles:
    """Paths of the written movie: `gif` always, `mp4` when ffmpeg is
    installed (else None); `n_frames` shown; `dpi` of the GIF."""

    gif: pathlib.Path
    mp4: pathlib.Path | None
    n_frames: int
    dpi: int


def cores_by_frame(cores_per_frame: Mapping | None) -> dict[int, list[tuple[float, float, int]]]:
    """{frame: [(x_um, y_um, charge), ...]} from a cores_per_frame table
    (columns frame, x_um, y_um, charge; strings from a CSV or numbers)."""
    out: dict[int, list[tuple[float, float, int]]] = {}
    if not cores_per_frame:
        return out
    cols = [cores_per_frame.get(k) for k in ("frame", "x_um", "y_um", "charge")]
    if any(c is None for c in cols):
        raise InputError("a core table needs the columns frame, x_um, y_um and charge")
    for fr, x, y, q in zip(*cols, strict=True):
        out.setdefault(int(float(fr)), []).append((float(x), float(y), int(float(q))))
    return out


def _build(pf, dpi: int):
    fig = Figure(figsize=(8.0, 4.0), dpi=dpi, layout="constrained")
    ax_s, ax_p = fig.subplots(1, 2)
    extent = pf.grid.extent_mm(pf.phase.shape[1:])
    vals = np.abs(pf.signal[np.isfinite(pf.signal)])
    lim = float(np.percentile(vals, 99)) if vals.size else 1.0
    im_s = ax_s.imshow(pf.signal[0], cmap=_cmap("gray"), vmin=-lim, vmax=lim or 1.0, extent=extent,
                       origin="upper", interpolation="nearest")
    im_p = ax_p.imshow(pf.phase[0], cmap=_cmap(PHASE_CMAP), vmin=-math.pi, vmax=math.pi, extent=extent,
                       origin="upper", interpolation="nearest")
    markers = []
    for ax, title in ((ax_s, "processed signal"), (ax_p, "phase")):
        ax.set_xlim(extent[0], extent[1])
        ax.set_ylim(extent[2], extent[3])
        ax.set_xlabel("x (mm)")
        ax.set_ylabel("y (mm)")
        ax.set_title(title, fontsize=10)
        _scale_bar(ax, extent)
        plus = ax.plot([], [], ls="none", marker="o", ms=7, mfc="none", mec=CHARGE_COLOURS[1], mew=2)[0]
        minus = ax.plot([], [], ls="none", marker="o", ms=7, mfc="none", mec=CHARGE_COLOURS[-1], mew=2)[0]
        markers.append((plus, minus))
    cb = fig.colorbar(im_p, ax=ax_p, shrink=0.8, label="phase (rad)")
    cb.set_ticks([-math.pi, 0, math.pi], labels=["-\u03c0", "0", "\u03c0"])
    title = fig.suptitle("t = 0.0 min (frame 0)   cores: orange = charge +1 (clockwise), "
                         "blue = -1 (counterclockwise)", fontsize=10)
    # lay out once, then freeze: constrained layout on every frame costs ~0.3 s
    fig.draw_without_rendering()
    fig.set_layout_engine("none")
    return fig, im_s, im_p, markers, title


def _frame_updater(pf, cores: dict, im_s, im_p, markers, title):
    def update(i: int) -> None:
        im_s.set_data(pf.signal[i])
        im_p.set_data(pf.phase[i])
        here = cores.get(int(pf.frames[i]), [])
        for plus, minus in markers:
            for line, sign in ((plus, 1), (minus, -1)):
                pts = [(x / 1000.0, y / 1000.0) for x, y, q in here if np.sign(q) == sign]
                line.set_data([p[0] for p in pts], [p[1] for p in pts])
        title.set_text(
            f"t = {pf.t_min[i]:.1f} min (frame {int(pf.frames[i])})   "
            "cores: orange = charge +1 (clockwise), blue = -1 (counterclockwise)"
        )

    return update


def _render_gif(pf, cores: dict, path: pathlib.Path, *, fps: float, dpi: int, progress: bool) -> None:
    """GIF frames by blitting: the axes, colour bar and labels are drawn once,
    then only the two images, the core markers and the title per frame
    (a full redraw costs about 0.25 s a frame); Pillow writes the GIF, as
    matplotlib's PillowWriter does."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image
    from tqdm.auto import tqdm

    fig, im_s, im_p, markers, title = _build(pf, dpi)
    canvas = FigureCanvasAgg(fig)
    # images first, then everything drawn over them (markers, scale bars), then the title
    overlays = [a for ax in (im_s.axes, im_p.axes) for a in list(ax.lines) + list(ax.texts)]
    moving = [im_s, im_p] + overlays + [title]
    for artist in moving:
        artist.set_animated(True)
    canvas.draw()
    background = canvas.copy_from_bbox(fig.bbox)
    update = _frame_updater(pf, cores, im_s, im_p, markers, title)
    frames = []
    for i in tqdm(range(len(pf.frames)), desc="movie (gif)", unit="frame", disable=not progress, leave=False):
        update(i)
        canvas.restore_region(background)
        for artist in moving:
            fig.draw_artist(artist)
        rgb = np.asarray(canvas.buffer_rgba())[..., :3]
        frames.append(Image.fromarray(np.ascontiguousarray(rgb)).quantize(colors=256, method=Image.Quantize.MEDIANCUT))
    # GIF stores frame delays in hundredths of a second
    frames[0].save(path, format="GIF", save_all=True, append_images=frames[1:], duration=10 * max(1, int(round(100 / fps))),
                   loop=0, optimize=False)


def _render_writer(pf, cores: dict, path: pathlib.Path, writer, *, dpi: int, progress: bool) -> None:
    """Frames through a matplotlib animation writer (full redraw per frame)."""
    from tqdm.auto import tqdm

    fig, im_s, im_p, markers, title = _build(pf, dpi)
    update = _frame_updater(pf, cores, im_s, im_p, markers, title)
    with writer.saving(fig, str(path), dpi):
        for i in tqdm(range(len(pf.frames)), desc=f"movie ({path.suffix[1:]})", unit="frame", disable=not progress,
                      leave=False):
            update(i)
            writer.grab_frame()


def _atomic_render(target: pathlib.Path, render) -> int:
    """Run `render(tmp_path)` on a temporary file beside `target`, then
    move it into place; returns the file's size in bytes."""
    fd, name = tempfile.mkstemp(dir=target.parent, prefix=f".{target.stem}.", suffix=target.suffix)
    os.close(fd)
    tmp = pathlib.Path(name)
    try:
        render(tmp)
        size = tmp.stat().st_size
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(tmp, 0o666 & ~umask)  # mkstemp makes 0600; give the usual file mode
        os.replace(tmp, target)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return size


def write_movie(
    phase_frames,
    out_dir,
    *,
    cores_per_frame: Mapping | None = None,
    name: str = "movie",
    fps: float = 8.0,
    dpi: int = 72,
    max_bytes: int = MAX_MOVIE_BYTES,
    mp4: bool = True,
    progress: bool = False,
) -> MovieFiles:
    """Write `name`.gif (and `name`.mp4 when ffmpeg is available and `mp4`)
    into `out_dir`: processed signal beside phase for each frame of
    `phase_frames` (a `PhaseFrames`, at most 120 frames), cores marked.

    The GIF is re-rendered at lower dpi while it exceeds `max_bytes`.
    """
    from matplotlib import animation

    pf = phase_frames
    n = len(pf.frames)
    if n == 0:
        raise InputError("a movie needs at least one frame")
    if n > MAX_MOVIE_FRAMES:
        raise InputError(f"a movie holds at most {MAX_MOVIE_FRAMES} frames, got {n}; pick fewer frames")
    if not fps > 0:
        raise InputError(f"fps must be positive, got {fps!r}")
    out = pathlib.Path(out_dir)
    if not out.is_dir():
        raise InputError(f"cannot write the movie: {out} is not a folder")
    cores = cores_by_frame(cores_per_frame)
    gif = out / f"{name}.gif"
    d = int(dpi)
    while True:
        size = _atomic_render(gif, lambda tmp, d=d: _render_gif(pf, cores, tmp, fps=fps, dpi=d, progress=progress))
        if size <= max_bytes or d <= 30:
            break
        d = max(30, int(d * 0.7 * math.sqrt(max_bytes / size)))
    mp4_path = None
    if mp4 and animation.writers.is_available("ffmpeg"):
        mp4_path = out / f"{name}.mp4"
        writer = animation.FFMpegWriter(fps=fps, codec="libx264", extra_args=["-pix_fmt", "yuv420p"])
        _atomic_render(mp4_path, lambda tmp: _render_writer(pf, cores, tmp, writer, dpi=max(d, 80), progress=progress))
    return MovieFiles(gif=gif, mp4=mp4_path, n_frames=n, dpi=d)
