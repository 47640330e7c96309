"""The engine against published physics.  Each test names its source."""

import math

import numpy as np
import pytest
from scipy.optimize import brentq
from scipy.special import hankel2

from quietlayer.engine import (C0, MU0, Block, Boundary, DivergenceError, Probe,
                               Scenario, Side, Source, build_grid, simulate)

CPML = Side(kind="cpml", cells=10, order=3.0, sigma_ratio=1.0)
PERIODIC = Side(kind="periodic")


def yee_wavenumber(omega, dt, dx, dy, angle):
    """Numerical wavenumber from the 2D Yee dispersion relation (Taflove & Hagness):
    [sin(w dt/2)/(c dt)]^2 = [sin(kx dx/2)/dx]^2 + [sin(ky dy/2)/dy]^2."""
    lhs = (math.sin(omega * dt / 2) / (C0 * dt)) ** 2
    f = lambda k: ((math.sin(k * math.cos(angle) * dx / 2) / dx) ** 2
                   + (math.sin(k * math.sin(angle) * dy / 2) / dy) ** 2 - lhs)
    k0 = omega / C0
    return brentq(f, 0.5 * k0, 2.0 * k0, xtol=1e-15 * k0)


def yee_omega(k, dt, dx, dy, angle):
    """Angular frequency of a Yee plane wave of wavenumber k (same relation)."""
    rhs = ((math.sin(k * math.cos(angle) * dx / 2) / dx) ** 2
           + (math.sin(k * math.sin(angle) * dy / 2) / dy) ** 2)
    return 2.0 / dt * math.asin(C0 * dt * math.sqrt(rhs))


# --- stability -----------------------------------------------------------

def small_box(**kw):
    base = dict(dx=1e-3, dy=1e-3, nx=30, ny=30, steps=10_000, courant=0.99,
                precision="float64", source=Source(x=15, y=15, f_max=20e9),
                probes=(Probe("p", 20, 15),), boundary=Boundary.all_sides(CPML))
    base.update(kw)
    return Scenario(**base)


def test_courant_099_stays_bounded_for_10000_steps():
    # Courant limit c dt <= 1/sqrt(1/dx^2 + 1/dy^2) (Taflove & Hagness): 0.99 x is stable.
    r = simulate(small_box())
    assert np.all(np.isfinite(r.energy))
    assert r.energy[-1] <= r.energy.max()
    assert r.energy[-1] < 1e-6 * r.energy.max()  # and the layer has drained it


def test_courant_above_limit_is_refused():
    # Same limit (Taflove & Hagness): a scenario above 1.0 x is rejected with a named error.
    from quietlayer.engine import ScenarioError
    with pytest.raises(ScenarioError) as err:
        small_box(courant=1.02)
    assert err.value.field == "courant"
    assert "<= 1" in str(err.value)


def test_courant_102_forced_diverges_and_is_caught():
    # Past the Courant limit (Taflove & Hagness) the scheme is unstable: the
    # divergence guard must stop the run and name the step.
    s = small_box()
    object.__setattr__(s, "courant", 1.02)  # bypass validation on purpose
    with pytest.raises(DivergenceError) as err:
        simulate(s)
    assert 0 < err.value.step <= 10_000
    assert f"step {err.value.step}" in str(err.value)


# --- numerical dispersion -------------------------------------------------

@pytest.mark.parametrize("cells_per_wavelength", [10, 20])
def test_axis_phase_velocity_matches_yee_dispersion(cells_per_wavelength):
    # Phase velocity of a plane wave along x, measured from the phase delay
    # between two probes, vs the Yee dispersion relation (Taflove & Hagness).
    d = 1e-3
    f = C0 / (cells_per_wavelength * d)
    s = Scenario(dx=d, dy=d, nx=200, ny=4, steps=900, courant=0.9, precision="float64",
                 source=Source(x=20, y=2, f_min=0.6 * f, f_max=1.4 * f, waveform="modulated_gaussian",
                               line="y"),
                 probes=(Probe("a", 60, 2), Probe("b", 140, 2)),
                 boundary=Boundary(left=CPML, right=CPML, bottom=PERIODIC, top=PERIODIC))
    r = simulate(s)
    n = 1 << 16
    freqs = np.fft.rfftfreq(n, s.dt)
    m = np.argmin(abs(freqs - f))
    ratio = np.fft.rfft(r.probes["b"], n)[m] / np.fft.rfft(r.probes["a"], n)[m]
    distance = 80 * d
    k_theory = yee_wavenumber(2 * math.pi * freqs[m], s.dt, d, d, 0.0)
    # the phase delay is known modulo 2 pi; the whole turns come from the theory
    delay = -np.angle(ratio)
    turns = round((k_theory * distance - delay) / (2 * math.pi))
    k_measured = (delay + 2 * math.pi * turns) / distance
    assert abs(k_theory / k_measured - 1) < 1e-3  # phase velocity w/k to 0.1 %
    # the grid's dispersion is visible at this tolerance: |v_Yee / c0 - 1| > 0.1 %
    assert abs(2 * math.pi * freqs[m] / k_theory / C0 - 1) > 1e-3


@pytest.mark.parametrize("n_cells, mode, expected_cpw", [(99, 7, 10.0), (198, 7, 20.0)])
def test_diagonal_phase_velocity_matches_yee_dispersion(n_cells, mode, expected_cpw):
    # A plane-wave eigenmode cos(k (x + y)/sqrt 2) on a periodic square, 45 degrees
    # off the axes; its measured frequency gives the phase velocity, compared with
    # the Yee dispersion relation (Taflove & Hagness).
    d = 1e-3
    k_axis = 2 * math.pi * mode / (n_cells * d)
    k = math.sqrt(2) * k_axis
    assert abs(2 * math.pi / k / d - expected_cpw) < 0.01
    s = Scenario(dx=d, dy=d, nx=n_cells, ny=n_cells, steps=400, courant=0.7, precision="float64",
                 source=Source(x=0, y=0, f_max=1e9, amplitude=1e-300),
                 probes=(Probe("p", 3, 5),), boundary=Boundary.all_sides(PERIODIC))
    grid = build_grid(s)
    i = np.arange(grid.shape[0])[:, None]
    j = np.arange(grid.shape[1])[None, :]
    r = simulate(s, grid=grid, initial=np.cos(k_axis * d * (i + j)))
    x = r.probes["p"]
    # a single discrete tone obeys x[n+1] + x[n-1] = 2 cos(w dt) x[n]
    cos_wdt = np.dot(x[1:-1], x[2:] + x[:-2]) / (2 * np.dot(x[1:-1], x[1:-1]))
    omega = math.acos(cos_wdt) / s.dt
    v_measured = omega / k
    v_theory = yee_omega(k, s.dt, d, d, math.pi / 4) / k
    assert abs(v_measured / v_theory - 1) < 1e-3
    assert abs(v_theory / C0 - 1) > 1e-4  # the check sees real dispersion


# --- line-source field ----------------------------------------------------

def test_line_source_matches_hankel_greens_function():
    # 2D line current I(t): Ez(w) = -(w mu0 / 4) I(w) H0^(2)(k rho) for the
    # e^{jwt} convention (Harrington; Balanis), built with scipy.special.hankel2.
    d = 1e-3
    f_max = C0 / (25 * d)  # 25 cells per wavelength at f_max
    s = Scenario(dx=d, dy=d, nx=120, ny=120, steps=700, courant=0.99, precision="float64",
                 source=Source(x=60, y=60, f_max=f_max, waveform="diff_gaussian"),
                 probes=(Probe("p", 75, 60),), boundary=Boundary.all_sides(CPML))
    r = simulate(s)
    measured = r.probes["p"]
    n = 1 << 15
    t = np.arange(n) * s.dt
    current = s.source.amplitude * s.source.pulse(t)
    spectrum = np.fft.rfft(current)
    omega = 2 * math.pi * np.fft.rfftfreq(n, s.dt)
    rho = 15 * d
    with np.errstate(invalid="ignore"):
        green = -(omega * MU0 / 4) * hankel2(0, omega / C0 * rho)
    green[0] = 0.0
    analytic = np.fft.irfft(spectrum * green, n)[: measured.size]
    corr = np.dot(measured, analytic) / math.sqrt(np.dot(measured, measured) * np.dot(analytic, analytic))
    amplitude = np.abs(measured).max() / np.abs(analytic).max()
    assert corr >= 0.99
    assert abs(amplitude - 1) <= 0.02


# --- Fresnel reflection ---------------------------------------------------

def _fresnel_deviation(cells_per_wavelength):
    """Largest |Gamma_measured / Gamma - 1| over the -20 dB band of the pulse."""
    d = 1e-3
    f_max = C0 / (cells_per_wavelength * d)
    common = dict(dx=d, dy=d, nx=400, ny=2, steps=int(900 * cells_per_wavelength / 40),
                  courant=0.9, precision="float64",
                  source=Source(x=100, y=1, f_max=f_max, waveform="diff_gaussian", line="y"),
                  probes=(Probe("p", 150, 1),),
                  boundary=Boundary(left=CPML, right=CPML, bottom=PERIODIC, top=PERIODIC))
    half_space = Block(x0=250, x1=math.inf, y0=-math.inf, y1=math.inf, eps_r=4.0)
    test = simulate(Scenario(blocks=(half_space,), **common)).probes["p"]
    incident = simulate(Scenario(**common)).probes["p"]
    reflected = test - incident
    n = 1 << 15
    inc_f = np.fft.rfft(incident, n)
    ref_f = np.fft.rfft(reflected, n)
    band = np.abs(inc_f) > 0.1 * np.abs(inc_f).max()  # within -20 dB of the peak
    gamma = np.abs(ref_f[band] / inc_f[band])
    # the echo is inverted, as Gamma < 0 says
    assert reflected[np.argmax(np.abs(reflected))] * incident[np.argmax(np.abs(incident))] < 0
    return np.max(np.abs(gamma / (1 / 3) - 1))


def test_fresnel_normal_incidence_on_dielectric_half_space():
    # Gamma = (1 - n) / (1 + n) at normal incidence (Fresnel; Born & Wolf):
    # eps_r = 4 gives -1/3.  Plane wave in a periodic strip, 60 cells per vacuum
    # wavelength at f_max (30 in the dielectric).
    assert _fresnel_deviation(60) < 0.01


def test_fresnel_error_converges_at_second_order():
    # The Yee scheme is second-order accurate (Taflove & Hagness): doubling the
    # resolution divides the deviation from Fresnel by about four.
    coarse, fine = _fresnel_deviation(40), _fresnel_deviation(80)
    assert 3.0 < coarse / fine < 5.0


# --- symmetry and duality -------------------------------------------------

def _centred(polarization, **kw):
    base = dict(dx=1e-3, dy=0.8e-3, nx=40, ny=30, steps=300, courant=0.95, precision="float64",
                polarization=polarization, source=Source(x=20, y=15, f_max=20e9),
                boundary=Boundary.all_sides(Side(cells=8, order=3, sigma_ratio=1.2,
                                                 kappa_max=3.0, alpha_max=0.05)))
    base.update(kw)
    return Scenario(**base)


@pytest.mark.parametrize("precision", ["float32", "float64"])
def test_tmz_tez_duality_is_bitwise(precision):
    # Maxwell duality (E -> H, H -> -E, eps <-> mu; Harrington): in vacuum the TEz
    # run is the TMz run with Hz = Ez / eta0, Ex = -eta0 Hx, Ey = -eta0 Hy.
    tm = simulate(_centred("TMz", precision=precision), keep_fields=True)
    te = simulate(_centred("TEz", precision=precision), keep_fields=True)
    for a, b in zip(tm.state, te.state):
        assert np.array_equal(a, b)
    assert np.abs(tm.state[0]).max() > 0


@pytest.mark.parametrize("polarization", ["TMz", "TEz"])
def test_mirror_symmetry_of_centred_source_is_bitwise(polarization):
    # Mirror symmetry of Maxwell's equations: a centred source in a symmetric
    # grid gives a symmetric primary field, to the last bit.
    r = simulate(_centred(polarization), keep_fields=True)
    P = r.state[0]
    assert np.array_equal(P, P[::-1, :])
    assert np.array_equal(P, P[:, ::-1])


# --- absorption -------------------------------------------------------------

@pytest.mark.parametrize("polarization", ["TMz", "TEz"])
def test_cpml_absorbs_outgoing_pulse(polarization):
    # Absorption sanity (common practice, no source): 10 cells, m = 3,
    # sigma_max = sigma_opt; the pulse that left the interior keeps < 0.01 %
    # of its energy.
    s = Scenario(dx=1e-3, dy=1e-3, nx=60, ny=60, steps=1200, courant=0.99, precision="float64",
                 polarization=polarization, source=Source(x=30, y=30, f_max=15e9),
                 boundary=Boundary.all_sides(CPML))
    r = simulate(s)
    assert r.energy[-1] < 1e-4 * r.energy.max()


# --- threads ----------------------------------------------------------------

@pytest.mark.parametrize("boundary", [
    Boundary.all_sides(CPML),
    Boundary(left=CPML, right=CPML, bottom=PERIODIC, top=PERIODIC),
    Boundary(left=PERIODIC, right=PERIODIC, bottom=Side(kind="wall"), top=CPML),
], ids=["cpml", "periodic-y", "periodic-x"])
@pytest.mark.parametrize("polarization", ["TMz", "TEz"])
def test_two_threads_give_the_same_bits_as_one(boundary, polarization):
    # Splitting the rows between threads must not change one operation
    # (common practice, no source: a parallel update is deterministic).
    s = Scenario(dx=1e-3, dy=1e-3, nx=70, ny=50, steps=400, polarization=polarization,
                 source=Source(x=20, y=15, f_max=12e9), boundary=boundary,
                 blocks=(Block(30, 50, -math.inf, 12, eps_r=3.0, sigma=0.05),))
    one = simulate(s, threads=1, keep_fields=True)
    two = simulate(s, threads=2, keep_fields=True)
    for a, b in zip(one.state, two.state):
        assert np.array_equal(a, b)


def test_reusing_a_grid_starts_from_rest():
    # Each run starts from zero fields and zero psi (common practice, no source).
    s = _centred("TMz", steps=150)
    grid = build_grid(s)
    first = simulate(s, grid=grid, keep_fields=True)
    second = simulate(s, grid=grid, keep_fields=True)
    for a, b in zip(first.state, second.state):
        assert np.array_equal(a, b)
