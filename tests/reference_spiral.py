"""An independent spiral solver for the model tests: plain numpy in float64,
no waves code.  Explicit Euler, 5-point Laplacian with no-flux edges (ghost
cell = edge cell), started from a broken wave of its own (a strip excited, its
back refractory, the free end at the centre), period from upward threshold
crossings at a 4 x 4 lattice of probes after a transient."""

from __future__ import annotations

import numpy as np

BARKLEY = {"a": 0.75, "b": 0.02, "eps": 0.02}
FHN = {"eps": 0.3, "beta": 0.7, "gamma": 0.5}


def _laplacian(u: np.ndarray, h: float) -> np.ndarray:
    out = -4.0 * u
    out[1:] += u[:-1]
    out[0] += u[0]
    out[:-1] += u[1:]
    out[-1] += u[-1]
    out[:, 1:] += u[:, :-1]
    out[:, 0] += u[:, 0]
    out[:, :-1] += u[:, 1:]
    out[:, -1] += u[:, -1]
    out *= 1.0 / (h * h)
    return out


def spiral_periods(model: str, *, side: float, h: float, dt: float, t_end: float,
                   t_after: float) -> np.ndarray:
    """Period (model time units) at each of 16 probes of a spiral in a square
    no-flux box of `side` model units, from crossings after `t_after`."""
    n = int(round(side / h))
    y, x = (np.indices((n, n)) + 0.5) * h
    c = side / 2.0
    if model == "barkley":
        a, b, eps = BARKLEY["a"], BARKLEY["b"], BARKLEY["eps"]
        u = np.where((x < c) & (x > c - 3) & (y < c), 1.0, 0.0)
        v = np.where((x >= c) & (x < c + 5) & (y < c), 0.5, 0.0)

        def f(u, v):
            return u * (1 - u) * (u - (v + b) / a) / eps, u - v

        thr = 0.5
    elif model == "fhn":
        eps, beta, gamma = FHN["eps"], FHN["beta"], FHN["gamma"]
        roots = np.roots([-1 / 3, 0.0, 1 - 1 / gamma, -beta / gamma])
        u_rest = float(roots[np.abs(roots.imag) < 1e-9].real[0])
        v_rest = (u_rest + beta) / gamma
        u = np.where((x < c) & (x > c - 6) & (y < c), 2.0, u_rest)
        v = np.where((x >= c) & (x < c + 12) & (y < c), 1.0, v_rest)

        def f(u, v):
            return (u - u * u * u / 3 - v) / eps, eps * (u + beta - gamma * v)

        thr = 0.0
    else:
        raise ValueError(model)
    lattice = (0.125, 0.375, 0.625, 0.875)
    pi = np.array([int(fy * (n - 1) + 0.5) for fy in lattice for _ in lattice])
    pj = np.array([int(fx * (n - 1) + 0.5) for _ in lattice for fx in lattice])
    crossings = [[] for _ in pi]
    prev = u[pi, pj].copy()
    for k in range(1, int(round(t_end / dt)) + 1):
        fu, fv = f(u, v)
        u, v = u + dt * (fu + _laplacian(u, h)), v + dt * fv
        cur = u[pi, pj]
        t = k * dt
        if t > t_after:
            for m in np.nonzero((prev < thr) & (cur >= thr))[0]:
                crossings[m].append(t - dt + dt * (thr - prev[m]) / (cur[m] - prev[m]))
        prev = cur.copy()
    return np.array([np.median(np.diff(cr)) if len(cr) > 2 else np.nan for cr in crossings])
