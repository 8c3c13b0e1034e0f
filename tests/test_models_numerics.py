"""Numerics of the shared integrator: exact discrete solutions, conservation,
stability limits, compiled kernels against their numpy twins, and the
bistable-front speed."""

from __future__ import annotations

import math

import numpy as np
import pytest

from waves.errors import SimulationError, StabilityError, WavesError
from waves.models import available_models, get_model
from waves.models.base import Integrator, check_time_step, diffusion_dt_limit
from waves.models.grid import Grid
from waves.models.heterogeneity import Ramp, correlated_noise
from waves.models.nagumo import front_speed

TWO_VARIABLE = ("barkley", "fhn")
OWN_MODELS = ("barkley", "fhn", "nagumo")


def _integrator(name, grid, state, *, dt, multipliers=None, params=None, probes=None):
    spec = get_model(name)
    q = spec.resolve_params(params)
    return Integrator(spec, grid, q, state, dt=dt, diffusion=1.0, multipliers=multipliers,
                      probes_yx=probes)


def _random_state(spec, shape, rng):
    lo_hi = [spec.observable_ranges[v] for v in spec.variables]
    return np.stack([
        (lo + (hi - lo) * rng.random(shape)).astype(np.float32) for lo, hi in lo_hi
    ])


def _inert(shape):
    """A grid whose cells are all empty: no reaction, variable 0 only diffuses."""
    return np.zeros(shape, np.float32)


# ----------------------------------------------------------------- registry


def test_registry_lists_own_models_and_refuses_unknown():
    names = available_models()
    for name in OWN_MODELS:
        assert name in names
    assert get_model("FitzHugh-Nagumo").name == "fhn"
    with pytest.raises(WavesError, match="unknown model 'nope'.*barkley"):
        get_model("nope")


def test_unknown_parameter_lists_valid_names():
    spec = get_model("barkley")
    with pytest.raises(WavesError, match="unknown parameter 'alpha'.*a, b, eps"):
        spec.resolve_params({"alpha": 1.0})


# ----------------------------------------------------------------- exact diffusion


@pytest.mark.parametrize("name", OWN_MODELS)
@pytest.mark.parametrize("engine", ["numba", "numpy"])
def test_periodic_fourier_mode_decays_by_von_neumann_factor(name, engine):
    # G = 1 - 4 r [sin^2(kx h/2) + sin^2(ky h/2)] per explicit step, r = D dt/h^2
    # (standard von Neumann analysis; REFERENCES.md "Numerics")
    ny, nx, h = 48, 64, 0.5
    r = 0.2
    dt = r * h * h
    mx, my = 3, 2
    kx, ky = 2 * np.pi * mx / (nx * h), 2 * np.pi * my / (ny * h)
    y = np.arange(ny)[:, None] * h
    x = np.arange(nx)[None, :] * h
    mode = (np.cos(kx * x) * np.cos(ky * y)).astype(np.float32)
    spec = get_model(name)
    state = np.zeros((len(spec.variables), ny, nx), np.float32)
    state[0] = mode
    grid = Grid((ny, nx), h, "periodic", occupancy=_inert((ny, nx)))
    it = _integrator(name, grid, state, dt=dt)
    n = 40
    it.advance(n, engine=engine)
    G = 1 - 4 * r * (np.sin(kx * h / 2) ** 2 + np.sin(ky * h / 2) ** 2)
    np.testing.assert_allclose(it.state[0], G**n * mode, atol=2e-6)


@pytest.mark.parametrize("engine", ["numba", "numpy"])
def test_noflux_box_cosine_mode_decays_by_von_neumann_factor(engine):
    # cos(pi m x / L) on the cell-centred no-flux grid (x_i = (i + 1/2) h) is an
    # exact eigenvector of the mirrored 5-point Laplacian, so it decays by the
    # same G as above (REFERENCES.md: no-flux box mode cos(pi x/L) cos(pi y/L))
    ny, nx, h = 40, 56, 0.25
    r = 0.25
    dt = r * h * h
    Lx, Ly = nx * h, ny * h
    kx, ky = np.pi * 2 / Lx, np.pi * 1 / Ly
    y = (np.arange(ny)[:, None] + 0.5) * h
    x = (np.arange(nx)[None, :] + 0.5) * h
    mode = (np.cos(kx * x) * np.cos(ky * y)).astype(np.float32)
    state = np.stack([mode, np.zeros_like(mode)])
    grid = Grid((ny, nx), h, "noflux", occupancy=_inert((ny, nx)))
    it = _integrator("barkley", grid, state, dt=dt)
    n = 60
    it.advance(n, engine=engine)
    G = 1 - 4 * r * (np.sin(kx * h / 2) ** 2 + np.sin(ky * h / 2) ** 2)
    np.testing.assert_allclose(it.state[0], G**n * mode, atol=2e-6)
    # and the continuum decay exp(-D (kx^2 + ky^2) t) to the scheme's O(h^2) accuracy
    # (REFERENCES.md: cos(pi x/L) cos(pi y/L) exp(-2 pi^2 D t / L^2) for a square box)
    exact = np.exp(-(kx**2 + ky**2) * n * dt)
    assert abs(G**n - exact) < 0.01 * exact


@pytest.mark.parametrize("boundary", ["noflux", "periodic"])
def test_mass_is_conserved_without_reaction_with_obstacles(boundary, rng):
    # no-flux walls and obstacle edges pass no flux: sum of u over the medium is
    # constant (common practice, no source: finite-volume form of the Laplacian)
    ny, nx, h = 50, 60, 0.5
    obstacles = np.zeros((ny, nx), bool)
    obstacles[10:20, 15:30] = True
    obstacles[35:45, 40:44] = True
    u = rng.random((ny, nx)).astype(np.float32)
    state = np.stack([u, np.zeros_like(u)])
    grid = Grid((ny, nx), h, boundary, occupancy=_inert((ny, nx)), obstacles=obstacles)
    it = _integrator("barkley", grid, state, dt=0.25 * h * h)
    before = float(u[~obstacles].astype(np.float64).sum())
    frozen = u[obstacles].copy()
    it.advance(300)
    after = float(it.state[0][~obstacles].astype(np.float64).sum())
    assert abs(after - before) < 2e-5 * before
    np.testing.assert_array_equal(it.state[0][obstacles], frozen)
    # diffusion smooths: the spread falls (sanity, common practice, no source)
    assert it.state[0][~obstacles].std() < 0.5 * u[~obstacles].std()


# ----------------------------------------------------------------- stability


def test_diffusion_limit_refuses_r_026_and_accepts_r_025():
    # dt <= h^2/(4 D) on a square 2-D grid, r = 0.25 stable, 0.26 not
    # (REFERENCES.md: Numerical Recipes ch. 20 [memory]; [computed])
    # (nagumo: its reaction limit dt <= 1 is far away; the same check serves
    # every model)
    spec = get_model("nagumo")
    q = spec.default_params()
    h = 0.25
    check_time_step(spec, q, dt=0.25 * h * h, spacing=h, diffusion=1.0)
    with pytest.raises(StabilityError, match=r"h\^2/\(4 D\)"):
        check_time_step(spec, q, dt=0.26 * h * h, spacing=h, diffusion=1.0)
    bark = get_model("barkley")
    check_time_step(bark, bark.default_params(), dt=0.25 * h * h, spacing=h, diffusion=1.0,
                    reaction_scale=0.0)  # reaction off: the diffusion limit alone
    with pytest.raises(StabilityError, match=r"h\^2/\(4 D\)"):
        check_time_step(bark, bark.default_params(), dt=0.26 * h * h, spacing=h,
                        diffusion=1.0, reaction_scale=0.0)
    # 1-D grids: dt <= h^2/(2 D)
    assert diffusion_dt_limit(h, 1.0, 1) == pytest.approx(h * h / 2)


@pytest.mark.parametrize("r, grows", [(0.25, False), (0.26, True)])
def test_checkerboard_mode_grows_only_above_the_limit(r, grows):
    # the fastest mode (kx h = ky h = pi) has G = 1 - 8 r: |G| <= 1 iff r <= 1/4
    # (standard von Neumann analysis); run the numpy twin directly, no check
    spec = get_model("barkley")
    n = 32
    ii, jj = np.indices((n, n))
    u = ((-1.0) ** (ii + jj)).astype(np.float32)
    S = np.stack([u, np.zeros_like(u)])
    ones, zeros = np.ones((n, n), np.float32), np.zeros((n, n), np.float32)
    p = spec.vector(spec.default_params())
    fidx = np.full(3, -1, np.int64)
    for _ in range(50):
        S = spec.numpy_step(S, np.float32(r), np.float32(1.0), np.float32(1.0), p,
                            np.ones((1, 1, 1), np.float32), fidx, zeros, ones, True)
    amp = float(np.abs(S[0]).max())
    assert amp == pytest.approx(abs(1 - 8 * r) ** 50, rel=1e-4)
    assert (amp > 1.0) == grows


def test_reaction_limits_are_enforced():
    # Barkley: dt <= eps / max(1, (1 + b)/a); FitzHugh-Nagumo: dt <= eps/4
    # (derived in the module docstrings from the fast-variable relaxation rate,
    # dt * rate <= 1; from memory: Barkley's own scheme needs dt below eps)
    bark = get_model("barkley")
    qb = bark.resolve_params({"eps": 0.005, "a": 0.5, "b": 0.0})
    with pytest.raises(StabilityError, match="reaction limit.*eps"):
        check_time_step(bark, qb, dt=0.0026, spacing=1.0, diffusion=1.0)
    check_time_step(bark, qb, dt=0.0025, spacing=1.0, diffusion=1.0)
    fhn = get_model("fhn")
    qf = fhn.default_params()
    with pytest.raises(StabilityError, match="eps/4"):
        check_time_step(fhn, qf, dt=0.08, spacing=1.0, diffusion=1.0)
    # a spatially varying eps is checked at its smallest value
    with pytest.raises(StabilityError):
        check_time_step(bark, bark.default_params(), dt=0.015, spacing=1.0, diffusion=1.0,
                        field_ranges={"eps": (0.01, 0.03)})


def test_integrator_refuses_unstable_dt_and_reports_nonfinite_time():
    spec = get_model("barkley")
    grid = Grid((16, 16), 0.25)
    state = np.zeros((2, 16, 16), np.float32)
    with pytest.raises(StabilityError):
        Integrator(spec, grid, spec.default_params(), state, dt=0.0163, diffusion=1.0)
    it = Integrator(spec, grid, spec.default_params(), state, dt=0.01, diffusion=1.0)
    it.advance(5)
    it.state[0, 8, 8] = 1e15  # u^3 / eps overflows float32 at once
    with pytest.raises(SimulationError, match="non-finite between model time 0.05 and 0.1"):
        it.advance(5)


# ----------------------------------------------------------------- twins


def _twin_pair(name, boundary, general, rng, shape=(37, 45)):
    spec = get_model(name)
    occ = obstacles = None
    multipliers = None
    if general:
        occ = np.where(rng.random(shape) < 0.2, 0.0, rng.uniform(0.5, 1.0, shape))
        obstacles = np.zeros(shape, bool)
        obstacles[5:9, 10:16] = True
        obstacles[0, :4] = True
        obstacles[-3:, -1] = True
        first = spec.param_names[0]
        multipliers = {first: (1 + 0.1 * rng.standard_normal(shape)).astype(np.float32)}
    grid = Grid(shape, spec.spacing, boundary, occupancy=occ, obstacles=obstacles)
    state = _random_state(spec, shape, rng)
    dt = 0.5 * diffusion_dt_limit(spec.spacing, 1.0, 2)
    probes = [(0, 0), (shape[0] - 1, shape[1] - 1), (17, 21)]
    a = _integrator(name, grid, state, dt=dt, multipliers=multipliers, probes=probes)
    b = _integrator(name, grid, state, dt=dt, multipliers=multipliers, probes=probes)
    return a, b


@pytest.mark.parametrize("name", OWN_MODELS)
@pytest.mark.parametrize("boundary", ["noflux", "periodic"])
@pytest.mark.parametrize("general", [False, True])
def test_compiled_kernel_equals_numpy_twin(name, boundary, general, rng):
    # the readable numpy step is the reference for the compiled one (STYLE.md,
    # common practice): float32 rounding only
    a, b = _twin_pair(name, boundary, general, rng)
    assert a.general == general
    ta = a.advance(7, engine="numba")
    tb = b.advance(7, engine="numpy")
    scale = max(1.0, float(np.abs(b.state).max()))
    np.testing.assert_allclose(a.state, b.state, rtol=1e-5, atol=2e-6 * scale)
    np.testing.assert_allclose(ta, tb, rtol=1e-5, atol=2e-6 * scale)
    np.testing.assert_allclose(tb[-1], b.state[0][[0, 36, 17], [0, 44, 21]])


@pytest.mark.parametrize("name", TWO_VARIABLE)
def test_fast_path_equals_general_path_on_uniform_medium(name, rng):
    # uniform occupancy 1, no obstacles, a multiplier of exactly 1: the general
    # path must reproduce the fast path (same equations, common practice)
    spec = get_model(name)
    shape = (30, 33)
    state = _random_state(spec, shape, rng)
    dt = 0.5 * diffusion_dt_limit(spec.spacing, 1.0, 2)
    fast = _integrator(name, Grid(shape, spec.spacing), state, dt=dt)
    gen = _integrator(name, Grid(shape, spec.spacing), state, dt=dt,
                      multipliers={spec.param_names[1]: np.ones(shape, np.float32)})
    assert not fast.general and gen.general
    fast.advance(10)
    gen.advance(10)
    np.testing.assert_allclose(fast.state, gen.state, rtol=1e-5, atol=2e-6)


def test_parallel_kernel_equals_serial_kernel(rng):
    # threads split rows only; each cell's update is the same arithmetic
    # (common practice, no source), so the results agree bit for bit
    spec = get_model("barkley")
    shape = (64, 80)
    state = _random_state(spec, shape, rng)
    runs = []
    for threads in (1, 2):
        it = Integrator(spec, Grid(shape, 0.25), spec.default_params(), state, dt=0.01,
                        diffusion=1.0, threads=threads)
        it.advance(20)
        runs.append(it.state.copy())
    np.testing.assert_array_equal(runs[0], runs[1])


# ----------------------------------------------------------------- bistable front


def _nagumo_front_speed(orientation, h, dt, a=0.25, D=1.0):
    """Speed of the Nagumo front started from the exact profile on a 350-unit line."""
    n = int(round(350.0 / h))
    x = np.arange(n) * h
    u0 = 1.0 / (1.0 + np.exp((x - 40.0) / np.sqrt(2 * D)))
    shape = (1, n) if orientation == "row" else (n, 1)
    state = u0.reshape(shape)[None].astype(np.float32)
    it = _integrator("nagumo", Grid(shape, h), state, dt=dt, params={"a": a})
    chunk = int(round(10.0 / dt))
    times, positions = [], []
    for _ in range(30):
        it.advance(chunk)
        u = it.state[0].ravel().astype(np.float64)
        k = int(np.nonzero(u < 0.5)[0][0])  # first cell below 0.5; front between k-1 and k
        pos = x[k - 1] + (u[k - 1] - 0.5) / (u[k - 1] - u[k]) * h
        times.append(it.time)
        positions.append(pos)
    t, p = np.array(times), np.array(positions)
    late = t >= 60.0  # after the start-up transient
    return np.polyfit(t[late], p[late], 1)[0]


@pytest.mark.parametrize("orientation", ["row", "column"])
def test_nagumo_front_speed_matches_mckean(orientation):
    # c = sqrt(D/2) (1 - 2a) (McKean 1970; REFERENCES.md)
    a, D, h = 0.25, 1.0, 0.25
    c = front_speed(a, D)
    assert c == pytest.approx(math.sqrt(0.5) * 0.5)
    dt = 0.8 * h * h / (2 * D)
    speed = _nagumo_front_speed(orientation, h, dt)
    # the discretisation error at h = 0.25, dt = 0.025: achieved -0.143 %; within 0.5 %
    assert abs(speed - c) < 0.005 * c
    # second order at fixed D dt / h^2 (numerical analysis, common practice): at h/2 the
    # error is a quarter (achieved -0.0358 %, ratio 0.24997 / 0.24996), and the Richardson
    # extrapolation is exact to 6e-8 / 9e-8 (row / column, achieved), within 4e-7
    fine = _nagumo_front_speed(orientation, h / 2, dt / 4)
    assert (fine - c) / (speed - c) == pytest.approx(0.25, abs=0.002)
    assert fine + (fine - speed) / 3 == pytest.approx(c, rel=4e-7)


# ----------------------------------------------------------------- heterogeneity


def test_correlated_noise_has_gaussian_autocorrelation():
    # white noise filtered by a Gaussian of sd s has autocorrelation
    # exp(-d^2 / (4 s^2)) (convolution of two Gaussians; common practice, no source)
    s = 3.0
    f = correlated_noise((512, 512), correlation_px=s, seed=7, periodic=True)
    assert abs(float(f.mean())) < 1e-6 and float(f.std()) == pytest.approx(1.0, abs=1e-5)
    for d in (2, 3, 6):
        rho = float(np.mean(f * np.roll(f, d, axis=1)))
        assert rho == pytest.approx(math.exp(-d * d / (4 * s * s)), abs=0.03)


def test_ramp_is_linear_between_its_times():
    # linear interpolation (exact arithmetic, no source needed)
    r = Ramp("b", 0.02, 0.1, start_min=10.0, end_min=30.0)
    assert r.value(0.0, run_min=60) == 0.02
    assert r.value(20.0, run_min=60) == pytest.approx(0.06)
    assert r.value(45.0, run_min=60) == 0.1
    with pytest.raises(WavesError):
        Ramp("b", 0.0, 1.0, start_min=5.0, end_min=5.0)


def test_small_grids_run_on_one_thread():
    # a parallel region per step does not pay below 512 x 512 (measured here,
    # see waves.models.base.PARALLEL_MIN_CELLS)
    from waves.models.base import PARALLEL_MIN_CELLS, auto_threads

    assert auto_threads(PARALLEL_MIN_CELLS - 1) == 1
    import numba

    assert 1 <= auto_threads(PARALLEL_MIN_CELLS) <= numba.config.NUMBA_NUM_THREADS


def test_fhn_rest_state_is_a_fixed_point_and_bistable_sets_are_refused():
    # both nullclines vanish at the rest state (algebra, no source)
    from waves.models.fhn import rest_state

    q = get_model("fhn").default_params()
    u, v = rest_state(q)
    assert abs(u - u**3 / 3 - v) < 1e-12
    assert abs(u + q["beta"] - q["gamma"] * v) < 1e-12
    assert -2.0 < u < -1.0  # on the left branch of the cubic nullcline
    with pytest.raises(WavesError, match="rest states"):
        rest_state({"eps": 0.3, "beta": 0.0, "gamma": 2.0})


def test_noise_kicks_have_the_euler_maruyama_sd():
    # a Wiener increment over time T has sd sqrt(T) (Euler-Maruyama; common
    # practice, no source)
    from waves.models.heterogeneity import add_noise

    u = np.zeros((400, 500), np.float32)
    where = np.ones_like(u)
    where[:, 250:] = 0.0
    add_noise(u, intensity=0.3, duration=0.04, rng=np.random.default_rng(5), where=where)
    assert float(u[:, :250].std()) == pytest.approx(0.3 * 0.2, rel=0.01)
    assert not u[:, 250:].any()


def test_integrator_fields_are_parameter_times_multiplier(rng):
    spec = get_model("barkley")
    m = (1 + 0.2 * rng.standard_normal((20, 24))).astype(np.float32)
    it = _integrator("barkley", Grid((20, 24), 0.25), np.zeros((2, 20, 24), np.float32),
                     dt=0.002, multipliers={"eps": m}, params={"eps": 0.03})
    assert list(it.fidx) == [-1, -1, 0]
    np.testing.assert_allclose(it.pf[0], np.float32(0.03) * m, rtol=1e-7)
    it.set_params({**spec.default_params(), "eps": 0.025})  # a ramp step rescales the field
    np.testing.assert_allclose(it.pf[0], np.float32(0.025) * m, rtol=1e-7)


def test_barkley_rest_state_never_holds_subnormal_numbers():
    # regression: values decaying towards rest must reach exactly 0 before
    # they become subnormal (float32 subnormals are below 1.18e-38, IEEE 754),
    # which slows every later step by an order of magnitude
    from waves.models.barkley import FLUSH_EVERY

    spec = get_model("barkley")
    grid = Grid((24, 24), 0.25)
    state = np.zeros((2, 24, 24), np.float32)
    state[1] = 1e-29  # v just above the flush level, decaying as (1 - dt)^n
    it = Integrator(spec, grid, spec.default_params(), state, dt=0.01, diffusion=1.0)
    tiny = np.finfo(np.float32).tiny
    for _ in range(20):
        it.advance(FLUSH_EVERY - 1)
        s = np.abs(it.state)
        assert not np.any((s > 0) & (s < tiny))
    assert np.all(it.state[1] == 0)  # flushed: 1e-29 * (1 - 0.01)^600 < 1e-30
