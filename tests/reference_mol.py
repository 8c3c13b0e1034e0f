"""Independent 1-D references for model numbers: method of lines with scipy's solve_ivp.

Test-only.  Nothing of waves is imported: the reaction terms are typed afresh
from the published equations as written in REFERENCES.md (Barkley 1991;
FitzHugh-Nagumo in the form u_t = (u - u^3/3 - v)/eps + u_xx, v_t = eps (u +
beta - gamma v); Martiel & Goldbeter 1987 with the Table 2 values), space is
the 3-point second difference on a uniform grid (no-flux cable or periodic
ring), and time is scipy's implicit BDF with the sparse Jacobian pattern, run
to tight tolerances so the spatial grid is the only error that matters; it
is removed by Richardson extrapolation over spacings h, h/2 (second-order
scheme: c(h) = c0 + K h^2).

Solitary speed: a wave launched at the left end of a no-flux cable; upward
threshold crossings at probe cells are located by solve_ivp's event root
finding on the dense output; the speed is the inverse slope of the arrival
times against position (least squares) over the second half of the cable.

Wave train: one pulse on a ring of length L, launched next to a refractory
patch so that it travels one way; the period is the interval between
upward crossings at one cell once settled (the last intervals agree to
1e-4), speed = L / period.
"""

from __future__ import annotations

import functools
import math

import numpy as np
from scipy import sparse
from scipy.integrate import solve_ivp
from scipy.optimize import brentq

# ----------------------------------------------------------------- reactions (model units)

BARKLEY = {"a": 0.75, "b": 0.02, "eps": 0.02}  # Barkley 1991 defaults used by the project
FHN = {"eps": 0.3, "beta": 0.7, "gamma": 0.5}  # REFERENCES.md (parameters from memory)
# Martiel & Goldbeter 1987 Table 2 [transcribed, REFERENCES.md], ke changed to an excitable value
RELAY = {"k1": 0.036, "k2": 0.666, "L1": 10.0, "L2": 0.005, "c": 10.0, "lam": 0.01, "theta": 0.01,
         "e": 1.0, "q": 4000.0, "sigma": 0.6, "ki": 1.7, "kt": 0.9, "ke": 10.0, "h": 5.0, "alpha": 3.0}
RELAY_D = 2.4  # 24000 um^2/min in (100 um)^2/min


def barkley_reaction(p):
    a, b, eps = p["a"], p["b"], p["eps"]

    def f(y):
        u, v = y
        return [u * (1 - u) * (u - (v + b) / a) / eps, u - v]

    return f


def fhn_reaction(p):
    eps, beta, gamma = p["eps"], p["beta"], p["gamma"]

    def f(y):
        u, v = y
        return [(u - u ** 3 / 3 - v) / eps, eps * (u + beta - gamma * v)]

    return f


def fhn_rest(p):
    roots = np.roots([-1 / 3, 0.0, 1 - 1 / p["gamma"], -p["beta"] / p["gamma"]])
    u = float(roots[np.abs(roots.imag) < 1e-9].real[0])
    return u, (u + p["beta"]) / p["gamma"]


def relay_reaction(p):
    """State order (g, rho, b): extracellular cAMP, active receptors, intracellular cAMP."""

    def f(y):
        g, rho, b = y
        f1 = (p["k1"] + p["k2"] * g) / (1 + g)
        f2 = (p["k1"] * p["L1"] + p["k2"] * p["L2"] * p["c"] * g) / (1 + p["c"] * g)
        Y = rho * g / (1 + g)
        phi = p["alpha"] * (p["lam"] * p["theta"] + p["e"] * Y ** 2) / (
            1 + p["alpha"] * p["theta"] + (1 + p["alpha"]) * p["e"] * Y ** 2)
        return [p["kt"] / p["h"] * b - p["ke"] * g,
                -f1 * rho + f2 * (1 - rho),
                p["q"] * p["sigma"] * phi - (p["ki"] + p["kt"]) * b]

    return f


def relay_rest(p):
    """Well-mixed rest state: rho and b at their steady state for given g, then dg/dt = 0."""

    def rho_b(g):
        f1 = (p["k1"] + p["k2"] * g) / (1 + g)
        f2 = (p["k1"] * p["L1"] + p["k2"] * p["L2"] * p["c"] * g) / (1 + p["c"] * g)
        rho = f2 / (f1 + f2)
        Y = rho * g / (1 + g)
        phi = p["alpha"] * (p["lam"] * p["theta"] + p["e"] * Y ** 2) / (
            1 + p["alpha"] * p["theta"] + (1 + p["alpha"]) * p["e"] * Y ** 2)
        return rho, p["q"] * p["sigma"] * phi / (p["ki"] + p["kt"])

    def dg(g):
        return p["kt"] / p["h"] * rho_b(g)[1] - p["ke"] * g

    # the lowest root: scan upward from g = 0 for the first sign change
    grid = np.geomspace(1e-6, 1.0, 400)
    vals = np.array([dg(g) for g in grid])
    k = int(np.nonzero(np.sign(vals[:-1]) != np.sign(vals[1:]))[0][0])
    g0 = brentq(dg, grid[k], grid[k + 1], xtol=1e-14)
    rho0, b0 = rho_b(g0)
    return g0, rho0, b0


# ----------------------------------------------------------------- method of lines


def _system(reaction, nvar: int, n: int, h: float, D: float, periodic: bool):
    """RHS on the stacked state [var0 (n), var1 (n), ...] and its Jacobian sparsity."""
    inv_h2 = D / (h * h)

    def rhs(t, y):
        Y = y.reshape(nvar, n)
        out = np.array(reaction(Y))
        u = Y[0]
        lap = np.empty(n)
        lap[1:-1] = u[:-2] - 2 * u[1:-1] + u[2:]
        if periodic:
            lap[0] = u[-1] - 2 * u[0] + u[1]
            lap[-1] = u[-2] - 2 * u[-1] + u[0]
        else:  # no flux: mirror ghost cells
            lap[0] = 2 * (u[1] - u[0])
            lap[-1] = 2 * (u[-2] - u[-1])
        out[0] += inv_h2 * lap
        return out.ravel()

    eye = sparse.identity(n, format="csr")
    offs = [-1, 0, 1] + ([-(n - 1), n - 1] if periodic else [])
    band = sparse.diags([np.ones(n - abs(o)) for o in offs], offs, format="csr")
    blocks = [[eye] * nvar for _ in range(nvar)]  # reactions couple the variables cell by cell
    blocks[0][0] = band
    return rhs, sparse.bmat(blocks, format="csr")


def _crossing_events(nvar: int, n: int, cells, threshold: float):
    events = []
    for j in cells:
        def ev(t, y, j=int(j)):
            return y[j] - threshold
        ev.direction = 1.0
        events.append(ev)
    return events


def cable_speed(reaction, rest, excited, *, h: float, length: float, D: float = 1.0,
                threshold: float, launch: float = 2.0, rtol: float = 1e-7) -> float:
    """Solitary-wave speed on a no-flux cable of `length`, grid step h (module doc)."""
    n = int(round(length / h))
    nvar = len(rest)
    x = (np.arange(n) + 0.5) * h
    y0 = np.empty((nvar, n))
    for k in range(nvar):
        y0[k] = rest[k]
        y0[k, x < launch] = excited[k]
    rhs, pattern = _system(reaction, nvar, n, h, D, periodic=False)
    cells = np.unique(np.linspace(0.5 * n, 0.9 * n, 9).astype(int))
    events = _crossing_events(nvar, n, cells, threshold)
    stop = events[-1]

    def last(t, y):
        return stop(t, y)

    last.direction, last.terminal = 1.0, True
    sol = solve_ivp(rhs, (0.0, 1e4), y0.ravel(), method="BDF", jac_sparsity=pattern, rtol=rtol,
                    atol=rtol * 1e-2, events=events[:-1] + [last])
    arrival = np.array([te[0] for te in sol.t_events])
    slope = np.polyfit(x[cells], arrival, 1)[0]
    return 1.0 / slope


def ring_train(reaction, rest, excited, refractory, *, h: float, length: float, D: float,
               threshold: float, period_guess: float, rotations: int = 10, rtol: float = 1e-7,
               atol=1e-9, refractory_fraction: float = 0.4) -> tuple[float, float]:
    """(period, spread) of one pulse on a ring of `length` (module doc); spread is the
    relative range of the last three crossing intervals."""
    n = int(round(length / h))
    nvar = len(rest)
    x = (np.arange(n) + 0.5) * h
    y0 = np.empty((nvar, n))
    for k in range(nvar):
        y0[k] = rest[k]
        w = min(2.0, 0.1 * length)
        y0[k, (x >= w) & (x < 2 * w)] = excited[k]
        # behind the excited patch (and across the seam) a refractory stretch: the pulse runs to +x
        y0[k, (x < w) | (x > length * (1.0 - refractory_fraction))] = refractory[k]
    rhs, pattern = _system(reaction, nvar, n, h, D, periodic=True)
    probe = n // 2
    sol = solve_ivp(rhs, (0.0, rotations * period_guess), y0.ravel(), method="BDF", jac_sparsity=pattern,
                    rtol=rtol, atol=atol, events=_crossing_events(nvar, n, [probe], threshold))
    t = sol.t_events[0]
    iv = np.diff(t)[-3:]
    return float(iv[-1]), float((iv.max() - iv.min()) / iv[-1])


def richardson(coarse: float, fine: float, ratio: float = 2.0, order: int = 2) -> float:
    """Extrapolation to h -> 0 of a quantity with error K h^order (grid ratio `ratio`)."""
    r = ratio ** order
    return (r * fine - coarse) / (r - 1)


def barkley_speed(h: float, length: float = 40.0) -> float:
    return cable_speed(barkley_reaction(BARKLEY), (0.0, 0.0), (1.0, 0.0), h=h, length=length,
                       threshold=0.5)


def fhn_speed(h: float, length: float = 60.0) -> float:
    rest = fhn_rest(FHN)
    return cable_speed(fhn_reaction(FHN), rest, (2.0, rest[1]), h=h, length=length, threshold=0.0)


def barkley_train(length: float, h: float, *, rotations: int = 12) -> tuple[float, float]:
    """(period, spread) of one Barkley pulse on a ring; refractory: v = 1 (u cannot fire)."""
    return ring_train(barkley_reaction(BARKLEY), (0.0, 0.0), (1.0, 0.0), (0.0, 1.0), h=h, length=length,
                      D=1.0, threshold=0.5, period_guess=length / 4.0, rotations=rotations,
                      refractory_fraction=0.05)


@functools.cache
def barkley_trains(lengths: tuple, spacings: tuple = (0.1, 0.05)) -> tuple[np.ndarray, np.ndarray]:
    """(period, speed) of Barkley ring trains, Richardson-extrapolated over `spacings`."""
    out = []
    for L in lengths:
        c = [L / barkley_train(L, hh)[0] for hh in spacings]
        out.append(richardson(c[0], c[1], spacings[0] / spacings[1]))
    speed = np.array(out)
    return np.asarray(lengths) / speed, speed


def fhn_train(length: float, h: float, *, rotations: int = 12) -> tuple[float, float]:
    """(period, spread) of one FitzHugh-Nagumo pulse on a ring; refractory: v = 1."""
    rest = fhn_rest(FHN)
    return ring_train(fhn_reaction(FHN), rest, (2.0, rest[1]), (rest[0], 1.0), h=h, length=length, D=1.0,
                      threshold=0.0, period_guess=length / 2.0, rotations=rotations, refractory_fraction=0.3)


@functools.cache
def fhn_trains(lengths: tuple, spacings: tuple = (0.25, 0.125)) -> tuple[np.ndarray, np.ndarray]:
    """(period, speed) of FHN ring trains, Richardson-extrapolated over `spacings`."""
    out = []
    for L in lengths:
        c = [L / fhn_train(L, hh)[0] for hh in spacings]
        out.append(richardson(c[0], c[1], spacings[0] / spacings[1]))
    speed = np.array(out)
    return np.asarray(lengths) / speed, speed


@functools.cache
def relay_trains(lengths: tuple, spacings: tuple = (0.2, 0.1), ke: float = 10.0) -> tuple[np.ndarray, np.ndarray]:
    """(period, speed) of relay ring trains (model units: minutes, 100 um), Richardson over `spacings`."""
    out = []
    for L in lengths:
        c = [L / relay_train(L, hh, ke=ke)[0] for hh in spacings]
        out.append(richardson(c[0], c[1], spacings[0] / spacings[1]))
    speed = np.array(out)
    return np.asarray(lengths) / speed, speed


def relay_train(length: float, h: float, *, ke: float = 10.0, D: float = RELAY_D,
                period_guess: float | None = None, rotations: int = 10) -> tuple[float, float]:
    p = {**RELAY, "ke": ke}
    rest = relay_rest(p)
    guess = length / 4.0 if period_guess is None else period_guess
    # excited: high cAMP; refractory: receptors desensitised (rho low)
    return ring_train(relay_reaction(p), rest, (5.0, rest[1], 100.0), (rest[0], 0.02, rest[2]),
                      h=h, length=length, D=D, threshold=1.0, period_guess=guess, rotations=rotations)


if __name__ == "__main__":  # a quick look at the numbers and the run time
    import time

    for fn, hs in ((barkley_speed, (0.1, 0.05, 0.025)), (fhn_speed, (0.25, 0.125, 0.0625))):
        cs = []
        for hh in hs:
            t0 = time.time()
            cs.append(fn(hh))
            print(fn.__name__, hh, cs[-1], f"{time.time() - t0:.1f}s", flush=True)
        print("  richardson", richardson(cs[0], cs[1]), richardson(cs[1], cs[2]))
    for L in (60.0, 36.0, 24.0):
        for hh in (0.2, 0.1):
            t0 = time.time()
            print("relay", L, hh, relay_train(L, hh), f"{time.time() - t0:.1f}s", flush=True)
    print(math.pi)
