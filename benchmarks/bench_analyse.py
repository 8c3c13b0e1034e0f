"""Wall time and peak memory of `waves analyse` beside a straightforward script.

The straightforward script is what people write first: load the whole stack
as float64, scipy.signal.hilbert along time on the whole array, np.angle, a
per-frame numpy charge count, and a per-pixel FFT peak for the period.  Both
run in child processes on the same uint8 stack (default 600 x 512 x 512, a
synthetic spiral and target, written once to a temporary folder); peak memory
is the child's maximum resident set size.

    python benchmarks/bench_analyse.py [--frames 600] [--size 512] [--skip-reference]

Prints figures; asserts nothing.  Targets (DESIGN.md): >= 15x faster, peak
memory <= 1 GB for the analysis (`--no-report`); the run that also writes the
HTML report (figures, phase movie) is timed apart.
"""

from __future__ import annotations

import argparse
import json
import os
import pathlib
import subprocess
import sys
import tempfile
import time

REFERENCE_SCRIPT = r"""
import sys, time
import numpy as np, scipy.signal, tifffile
path = sys.argv[1]
t0 = time.perf_counter()
x = tifffile.imread(path).astype(np.float64)
x -= x.mean(axis=0)
z = scipy.signal.hilbert(x, axis=0)
phase = np.angle(z)
def wrap(d):
    return (d + np.pi) % (2 * np.pi) - np.pi
n = 0
for p in phase:
    s = (wrap(p[1:, :-1] - p[:-1, :-1]) + wrap(p[1:, 1:] - p[1:, :-1])
         + wrap(p[:-1, 1:] - p[1:, 1:]) + wrap(p[:-1, :-1] - p[:-1, 1:]))
    n += int(np.count_nonzero(np.abs(s) > np.pi))
spec = np.abs(np.fft.rfft(x, axis=0))
k = np.argmax(spec[1:], axis=0) + 1
period_frames = x.shape[0] / k
print(f"reference: {n} charged plaquettes, median period {np.median(period_frames):.2f} frames, "
      f"{time.perf_counter() - t0:.2f} s")
"""




def _peak_of(cmd: list[str]) -> tuple[float, float, str]:
    """Run `cmd` under a tiny wrapper that reports its own child's peak RSS."""
    wrapper = (
        "import resource, subprocess, sys, time\n"
        "t0 = time.perf_counter()\n"
        "p = subprocess.run(sys.argv[1:], capture_output=True, text=True)\n"
        "wall = time.perf_counter() - t0\n"
        "sys.stdout.write(p.stdout)\n"
        "sys.stderr.write(p.stderr)\n"
        "print(f'@@ {wall} {resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss}')\n"
        "sys.exit(p.returncode)\n"
    )
    proc = subprocess.run([sys.executable, "-c", wrapper, *cmd], capture_output=True, text=True)
    if proc.returncode != 0:
        raise SystemExit(f"command failed ({proc.returncode}): {' '.join(cmd)}\n{proc.stderr[-2000:]}")
    lines = proc.stdout.strip().splitlines()
    wall, kib = lines[-1].split()[1:]
    return float(wall), float(kib) / 1024.0, "\n".join(lines[:-1])


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--frames", type=int, default=600)
    ap.add_argument("--size", type=int, default=512)
    ap.add_argument("--skip-reference", action="store_true")
    ap.add_argument("--skip-report", action="store_true", help="do not time the run that writes the report")
    args = ap.parse_args()

    from waves import io, synthetic
    from waves.render import DarkfieldStyle

    tmp = pathlib.Path(tempfile.mkdtemp(prefix="waves-bench-"))
    stack_path = tmp / "stack.tif"
    n, size = args.frames, args.size
    px = 10.0
    t0 = time.perf_counter()
    movie = synthetic.synthetic_movie(
        (n, size, size),
        pixel_size_um=px,
        frame_interval_s=20.0,
        speed_um_per_min=150.0,
        sources=[
            synthetic.SpiralSource(0.35 * size * px, 0.6 * size * px, 6.0, charge=1),
            synthetic.TargetSource(0.75 * size * px, 0.3 * size * px, 6.5),
        ],
        style=DarkfieldStyle(noise=0.02),
        seed=3,
    )
    io.write_stack(stack_path, movie.data, calibration=movie.calibration)
    del movie
    print(f"stack: {n} x {size} x {size} uint8 ({stack_path.stat().st_size / 2**20:.0f} MiB), "
          f"made in {time.perf_counter() - t0:.1f} s")

    env = dict(os.environ)
    env.setdefault("MPLBACKEND", "Agg")
    waves_cmd = [sys.executable, "-m", "waves.cli", "analyse", str(stack_path), "--out", str(tmp / "out"), "--quiet",
                 "--no-report"]
    # first run compiles numba kernels into the cache; time the second
    _peak_of(waves_cmd)
    w_wall, w_peak, w_out = _peak_of(waves_cmd)
    print("waves analyse:")
    print("  " + w_out.replace("\n", "\n  "))
    steps = json.loads((tmp / "out" / "summary.json").read_text())["analysis"].get("step_seconds", {})
    print("  cost of each step (s): " + ", ".join(f"{k.removesuffix('_s')} {v:.2f}" for k, v in steps.items()))
    rows = [("waves analyse", w_wall, w_peak)]
    if not args.skip_report:
        # the same with the HTML report (figures and phase movie): extra work, shown apart
        r_wall, r_peak, _ = _peak_of(waves_cmd[:-1])
        rows.append(("waves analyse + report", r_wall, r_peak))
    if not args.skip_reference:
        ref_path = tmp / "reference.py"
        ref_path.write_text(REFERENCE_SCRIPT)
        r_wall, r_peak, r_out = _peak_of([sys.executable, str(ref_path), str(stack_path)])
        print(f"  {r_out}")
        rows.append(("straightforward script", r_wall, r_peak))
        ref = rows[-1]
    print()
    print(f"{'':26s}{'wall s':>10s}{'peak MiB':>12s}")
    for name, wall, peak in rows:
        print(f"{name:26s}{wall:10.2f}{peak:12.0f}")
    if not args.skip_reference:
        print(f"analysis speed-up: {ref[1] / rows[0][1]:.1f}x   memory ratio: {ref[2] / rows[0][2]:.1f}x "
              "(targets: >= 15x, peak <= 1 GB)")
    for p in sorted(tmp.rglob("*"), reverse=True):
        p.unlink() if p.is_file() else p.rmdir()
    tmp.rmdir()


if __name__ == "__main__":
    main()
