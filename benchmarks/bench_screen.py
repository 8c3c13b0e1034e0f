"""Screen throughput on a local dask cluster: 2 workers against 1.

Run:  python benchmarks/bench_screen.py [--stacks 16] [--size 160] [--frames 150]

Writes a sheet of small synthetic dark-field stacks (`waves.synthetic`: a
spiral and a target pacemaker, two groups of spiral period, 20 um pixels,
30 s frames; invented demo values, cheap to make), then screens it
from scratch with a local cluster of 1 and of 2 single-threaded worker
processes, each into a fresh folder.  Every worker analyses one stack first
(outside the timing) so that the numba cache is loaded, and the report is
left out: the figure is stacks per minute of analysis (best of --repeats
screens, each into a fresh folder: other processes on a shared machine only
slow runs down), plus the speed-up of 2 workers over 1 and the cluster
start-up time.  DESIGN.md: batch screens
scale across workers of a dask cluster.  Not a test: nothing is asserted.
"""

from __future__ import annotations

import argparse
import pathlib
import shutil
import sys
import tempfile
import time

HERE = pathlib.Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))  # run from a checkout without installing

from waves import io, screen  # noqa: E402
from waves.synthetic import SpiralSource, TargetSource, synthetic_movie  # noqa: E402


def _warm(path: str) -> bool:
    """Analyse one stack in memory on a worker (loads the compiled kernels)."""
    from waves.result import analyse_file

    analyse_file(path)
    return True


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--stacks", type=int, default=16, help="stacks in the sheet (default 16)")
    p.add_argument("--size", type=int, default=160, help="pixels per side (default 160)")
    p.add_argument("--frames", type=int, default=150, help="frames per stack (default 150)")
    p.add_argument("--repeats", type=int, default=3, help="screens per cluster size; the best counts (default 3)")
    p.add_argument("--keep", action="store_true", help="keep the temporary folder")
    args = p.parse_args(argv)
    from distributed import Client, LocalCluster

    root = pathlib.Path(tempfile.mkdtemp(prefix="waves-bench-screen-"))
    try:
        t0 = time.perf_counter()
        lines = ["path,group"]
        side_um = args.size * 20.0
        for i in range(args.stacks):
            period = 6.0 if i % 2 == 0 else 7.0
            movie = synthetic_movie(
                (args.frames, args.size, args.size), pixel_size_um=20.0, frame_interval_s=30.0,
                speed_um_per_min=320.0, seed=i,
                sources=(SpiralSource(0.35 * side_um, 0.55 * side_um, period, charge=1),
                         TargetSource(0.8 * side_um, 0.25 * side_um, period + 0.3)),
            )
            name = f"s{i:03d}.tif"
            io.write_stack(root / name, movie.data, calibration=movie.calibration)
            lines.append(f"{name},period{period:g}")
        (root / "sheet.csv").write_text("\n".join(lines) + "\n")
        print(f"made {args.stacks} stacks of {args.frames} x {args.size} x {args.size} px "
              f"in {time.perf_counter() - t0:.1f} s")
        sheet = screen.read_sheet(root / "sheet.csv")
        rates = {}
        for n in (1, 2):
            t0 = time.perf_counter()
            cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, dashboard_address=None)
            client = Client(cluster)
            startup = time.perf_counter() - t0
            try:
                client.run(_warm, str(root / "s000.tif"))
                walls = []
                for rep in range(args.repeats):  # each into a fresh folder: nothing is reused
                    t0 = time.perf_counter()
                    res = screen.run_screen(sheet, out=root / f"out{n}_{rep}", client=client, progress=False,
                                            report=False, n_boot=500)
                    walls.append(time.perf_counter() - t0)
                wall = min(walls)
            finally:
                client.close()
                cluster.close()
            rates[n] = res.n_done / wall * 60.0
            print(f"{n} worker(s): cluster start {startup:.1f} s; {res.n_done} stacks in {wall:.2f} s "
                  f"= {rates[n]:.1f} stacks/min ({res.n_failed} failed)")
        print(f"speed-up 2 workers / 1 worker: {rates[2] / rates[1]:.2f}x")
    finally:
        if args.keep:
            print(f"kept {root}")
        else:
            shutil.rmtree(root, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
