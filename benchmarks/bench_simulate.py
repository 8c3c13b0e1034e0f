"""Cell updates per second of the compiled simulator step against numpy.

Run:  python benchmarks/bench_simulate.py [--sizes 512 2048] [--models barkley fhn]

For every registered model (barkley, fhn, and relay when present) and grid
size it prints, in one run, float32 cell-updates per second of
- the compiled kernel, time loop inside, on one thread and on all threads;
- the model's numpy twin (the general formula the tests use);
- for barkley and fhn, a lean numpy step (no masks, slicing into
  preallocated buffers, u*u*u): the fairest "well-vectorised numpy" baseline;
and the speed-up of the best compiled run over the best numpy run.  Each
figure is the best of --repeats measurements (other processes on a shared
machine only slow runs down).
Targets (DESIGN.md): >= 10x numpy and >= 3e9 cell-updates/s for the
two-variable models at 512 x 512 on 2 cores.  Not a test: nothing is asserted.
"""

from __future__ import annotations

import argparse
import time

import numba
import numpy as np

from waves.models import available_models, get_model
from waves.models.base import Integrator, diffusion_dt_limit
from waves.models.grid import Grid
from waves.models.stimulus import initial_state


def _lean_laplacian(u, lap, inv_h2):
    """No-flux 5-point Laplacian into a preallocated buffer (slicing, no copies)."""
    lap[...] = -4.0 * u
    lap[1:, :] += u[:-1, :]
    lap[0, :] += u[0, :]
    lap[:-1, :] += u[1:, :]
    lap[-1, :] += u[-1, :]
    lap[:, 1:] += u[:, :-1]
    lap[:, 0] += u[:, 0]
    lap[:, :-1] += u[:, 1:]
    lap[:, -1] += u[:, -1]
    lap *= inv_h2


def _lean_barkley(u, v, out_u, out_v, lap, dt, inv_h2, a, b, eps):
    _lean_laplacian(u, lap, inv_h2)
    out_u[...] = u + dt * (u * (1 - u) * (u - (v + b) / a) / eps + lap)
    out_v[...] = v + dt * (u - v)


def _lean_fhn(u, v, out_u, out_v, lap, dt, inv_h2, eps, beta, gamma):
    _lean_laplacian(u, lap, inv_h2)
    out_u[...] = u + dt * ((u - u * u * u / 3 - v) / eps + lap)
    out_v[...] = v + dt * eps * (u + beta - gamma * v)


LEAN = {"barkley": _lean_barkley, "fhn": _lean_fhn}


def _state(spec, params, n):
    return initial_state(spec, params, (n, n), spacing=spec.spacing, kind="spiral")


def _best(run, repeats):
    """Best (largest) rate of `repeats` runs: other processes on a shared
    machine only ever slow a run down (timeit's rule)."""
    return max(run() for _ in range(repeats))


def _compiled_rate(spec, params, n, dt, threads, seconds, repeats):
    it = Integrator(spec, Grid((n, n), spec.spacing), params, _state(spec, params, n), dt=dt,
                    diffusion=spec.diffusion, threads=threads)
    it.advance(2)  # compile / load from cache
    steps = 4
    while True:  # find a step count that takes about `seconds`
        t0 = time.perf_counter()
        it.advance(steps, check=False)
        el = time.perf_counter() - t0
        if el > seconds or steps > 1 << 20:
            break
        steps *= 2

    def run():
        t0 = time.perf_counter()
        it.advance(steps, check=False)
        return n * n * steps / (time.perf_counter() - t0)

    return _best(run, repeats)


def _twin_rate(spec, params, n, dt, seconds, repeats):
    it = Integrator(spec, Grid((n, n), spec.spacing), params, _state(spec, params, n), dt=dt,
                    diffusion=spec.diffusion)

    def run():
        steps, el = 0, 0.0
        while el < seconds:
            t0 = time.perf_counter()
            it.advance(1, engine="numpy", check=False)
            el += time.perf_counter() - t0
            steps += 1
        return n * n * steps / el

    return _best(run, repeats)


def _lean_rate(spec, params, n, dt, seconds, repeats):
    S = _state(spec, params, n)
    bufs = [S[0].copy(), S[1].copy(), np.empty_like(S[0]), np.empty_like(S[0])]
    lap = np.empty_like(S[0])
    f32 = np.float32
    args = [f32(dt), f32(1.0 / spec.spacing**2)] + [f32(params[k]) for k in spec.param_names]
    step = LEAN[spec.name]

    def run():
        u, v, u2, v2 = bufs
        steps, el = 0, 0.0
        while el < seconds:
            t0 = time.perf_counter()
            step(u, v, u2, v2, lap, *args)
            u, u2, v, v2 = u2, u, v2, v
            el += time.perf_counter() - t0
            steps += 1
        if u.dtype != np.float32:
            raise RuntimeError("the lean numpy step left float32")
        return n * n * steps / el

    return _best(run, repeats)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", type=int, nargs="+", default=[512, 2048])
    ap.add_argument("--models", nargs="+", default=None)
    ap.add_argument("--seconds", type=float, default=0.3, help="time per measurement")
    ap.add_argument("--repeats", type=int, default=5, help="measurements; the best is shown")
    args = ap.parse_args()
    models = args.models or [m for m in available_models() if m != "nagumo"]
    cores = numba.config.NUMBA_NUM_THREADS
    print(f"float32, explicit Euler, 5-point Laplacian; numba threads available: {cores}")
    header = (f"{'model':8s} {'grid':>9s} {'numba 1 thr':>12s} {'numba ' + str(cores) + ' thr':>12s} "
              f"{'numpy twin':>11s} {'numpy lean':>11s} {'speed-up':>9s}")
    print(header)
    print("-" * len(header))
    for name in models:
        spec = get_model(name)
        params = spec.default_params()
        for n in args.sizes:
            dt = spec.dt_fraction * min(diffusion_dt_limit(spec.spacing, spec.diffusion, 2),
                                        spec.reaction_dt_limit(params)[0])
            rep = (args.seconds, args.repeats)
            c1 = _compiled_rate(spec, params, n, dt, 1, *rep)
            cn = _compiled_rate(spec, params, n, dt, cores, *rep)
            tw = _twin_rate(spec, params, n, dt, *rep)
            lean = _lean_rate(spec, params, n, dt, *rep) if name in LEAN else float("nan")
            best_np = np.nanmax([tw, lean])
            print(f"{name:8s} {n:>4d}x{n:<4d} {c1:12.3g} {cn:12.3g} {tw:11.3g} {lean:11.3g} "
                  f"{max(c1, cn) / best_np:8.1f}x")
    print("cell-updates per second; speed-up = best compiled / best numpy")


if __name__ == "__main__":
    main()
