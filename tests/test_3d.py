"""The 3D confirmation run: the Yee scheme against published relations, the
light-cone reference against a full one, and the box against the 2D bench.

Small boxes throughout, so the whole file runs in well under a minute.
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest

from quietlayer.engine import Boundary, Probe, Scenario, Side, Source
from quietlayer.engine.confirm3d import (Reference3DCache, compute_reference, confirm_3d, reference_box,
                                         run_box)
from quietlayer.engine.errors import DivergenceError, ScenarioError
from quietlayer.engine.grid3d import FACE_GAP, Box3D, box_from_scenario, build_grid3d
from quietlayer.engine.measure import measure
from quietlayer.engine.units import C0, EPS0
from quietlayer.engine.waveforms import Pulse, design_pulse

D = 1e-3  # cubic cells of 1 mm


def bare_box(cells, *, courant=0.99, steps=10, probes=(), precision="float64", amplitude=1.0,
             pulse=None, faces=(None,) * 6, source=None) -> Box3D:
    """A box with electric walls (or the given faces) and a time step `courant` times the 3D limit."""
    dt = courant * D / (C0 * math.sqrt(3.0))
    if pulse is None:
        pulse = Pulse(kind="diff_gaussian", tau=8 * dt, t0=32 * dt)
    return Box3D(cells=tuple(cells), d=(D, D, D), dt=dt, steps=steps, faces=faces,
                 source=source or tuple(c // 2 for c in cells), pulse=pulse, probes=tuple(probes),
                 precision=precision, amplitude=amplitude)


def small_scenario(layer: Side | None = None, **changes) -> Scenario:
    """An invented 2D bench: 1 mm cells, a pulse up to 25 GHz (12 cells per wavelength),
    the source 10 cells in front of the right face, one probe 3 cells in front of it."""
    layer = layer or Side(kind="cpml", cells=6, order=3, sigma_ratio=1.0)
    base = dict(dx=D, dy=D, nx=60, ny=120, steps=400, source=Source(x=50, y=60, f_max=25e9),
                probes=(Probe("normal", 57, 60),), boundary=Boundary.all_sides(layer))
    base.update(changes)
    return Scenario(**base)


# --- stability and dispersion of the 3D Yee scheme ------------------------------

def test_time_step_is_the_3d_courant_limit_times_the_courant_number():
    # Courant limit in 3D: c dt <= 1 / sqrt(1/dx^2 + 1/dy^2 + 1/dz^2), i.e. dx / sqrt(3)
    # for cubic cells (Taflove & Hagness, ch. 4)
    box = box_from_scenario(small_scenario(courant=0.9))
    assert box.d == (D, D, D)
    assert box.courant_limit_dt == pytest.approx(D / (C0 * math.sqrt(3.0)), rel=1e-15)
    assert box.dt == pytest.approx(0.9 * D / (C0 * math.sqrt(3.0)), rel=1e-15)


def _random_fields(shape, seed=1):
    """Random E on the inner nodes of every component (walls keep tangential E at zero)."""
    rng = np.random.default_rng(seed)
    out = {}
    for name in ("Ex", "Ey", "Ez"):
        a = np.zeros(shape)
        inner = [slice(1, -1)] * 3
        inner["xyz".index(name[1])] = slice(0, -1)  # a component is interior along its own axis
        a[tuple(inner)] = rng.standard_normal(a[tuple(inner)].shape)
        out[name] = a
    return out


@pytest.mark.parametrize("courant, diverges", [(1.02, True), (0.995, False)])
def test_runs_diverge_just_above_the_courant_limit_and_not_below(courant, diverges):
    # Above c dt = dx / sqrt(3) the highest-k cavity modes grow without bound (Taflove &
    # Hagness, ch. 4, the 3D stability limit); the largest discrete wavenumber of a 12-cell
    # box puts its limit at 1.012 times the free-space one, so 1.02 must fail, 0.995 hold.
    box = bare_box((12, 12, 12), courant=courant, amplitude=0.0, steps=1500)
    grid = build_grid3d(box)
    initial = _random_fields(grid.shape)
    if diverges:
        with pytest.raises(DivergenceError):
            run_box(grid, check_every=20, initial=initial, record_probes=False)
    else:
        run = run_box(grid, check_every=20, initial=initial, record_probes=False)
        assert run.energy.max() < 2.0 * run.energy[0]


def _yee_cos_omega_dt(dt, k):
    """cos(omega dt) of a mode with wave vector k on the cubic Yee grid:
    [sin(omega dt / 2) / (c dt)]^2 = sum_i [sin(k_i d / 2) / d]^2 (Taflove & Hagness, ch. 4,
    numerical dispersion of the 3D Yee algorithm)."""
    s2 = (C0 * dt) ** 2 * sum((math.sin(ki * D / 2) / D) ** 2 for ki in k)
    return 1.0 - 2.0 * s2


def _measured_cos_omega_dt(series, first, last):
    """A single mode obeys e[n+1] + e[n-1] = 2 cos(omega dt) e[n] exactly: least squares over n."""
    e = np.asarray(series)
    n = np.arange(first, last)
    return float(np.sum((e[n + 1] + e[n - 1]) * e[n]) / (2.0 * np.sum(e[n] ** 2)))


def test_dispersion_along_an_axis_matches_the_yee_relation():
    # Ez = sin(k x) with k along x, 10 cells per wavelength.  The y walls hold Ez at zero and
    # disturb the mode, but a change moves at most one cell per step: a node 10 cells from
    # them sees the pure mode for the first 9 steps.
    nx, ny, nz = 40, 20, 20
    m = 8  # half wavelengths across x: 10 cells per wavelength, zero on both x walls
    k = m * math.pi / (nx * D)
    box = bare_box((nx, ny, nz), amplitude=0.0, steps=9, probes=(("p", (3, 10, 10)),))
    grid = build_grid3d(box)
    ez = np.zeros(grid.shape)
    ez[:, 1:-1, :-1] = np.sin(k * D * np.arange(nx + 1))[:, None, None]
    run = run_box(grid, initial={"Ez": ez})
    measured = _measured_cos_omega_dt(run.probes["p"], 1, 8)
    expected = _yee_cos_omega_dt(box.dt, (k, 0.0, 0.0))
    assert measured == pytest.approx(expected, abs=1e-12)
    # the grid really disperses: at 10 cells per wavelength omega is over 1 % below c k
    omega_grid, omega_free = math.acos(measured) / box.dt, C0 * k
    assert omega_grid < 0.99 * omega_free


def test_dispersion_along_the_diagonal_matches_the_yee_relation():
    # The cavity mode with k = (k, k, k): Ex = cos(k x) sin(k y) sin(k z), Ey = -sin cos sin,
    # Ez = 0 is divergence-free on the grid and vanishes on the walls, so it is an exact
    # eigenmode of the walled box and oscillates at the dispersion relation's frequency.
    n = 16
    m = 3
    k = m * math.pi / (n * D)
    box = bare_box((n, n, n), amplitude=0.0, steps=40, probes=(("p", (2, 5, 6)),))
    grid = build_grid3d(box)
    node = np.arange(n + 1) * D
    half = (np.arange(n + 1) + 0.5) * D
    s, c = np.sin(k * node), np.cos(k * half)
    ex = c[:, None, None] * s[None, :, None] * s[None, None, :]
    ey = -s[:, None, None] * c[None, :, None] * s[None, None, :]
    ex[-1], ey[:, -1] = 0.0, 0.0  # beyond the components' own ranges
    run = run_box(grid, initial={"Ex": ex, "Ey": ey}, probe_component="Ex")
    measured = _measured_cos_omega_dt(run.probes["p"], 1, 39)
    assert measured == pytest.approx(_yee_cos_omega_dt(box.dt, (k, k, k)), abs=1e-12)
    # along the diagonal the grid is faster than along an axis at the same |k| (Taflove & Hagness)
    k_axis = math.sqrt(3.0) * k
    assert math.acos(measured) > math.acos(_yee_cos_omega_dt(box.dt, (k_axis, 0.0, 0.0)))


# --- the source near field, against the closed form ---------------------------

def test_field_near_a_small_dipole_matches_the_closed_form():
    # An electric dipole of moment p(t) along z, on its equatorial plane (any
    # electromagnetics text, e.g. Jackson, ch. 9, in the time domain):
    #   Ez(r, t) = -1/(4 pi eps0) [p/r^3 + p'/(c r^2) + p''/(c^2 r)] at t - r/c,
    # with p' = I l.  Here I l = amplitude g(t) dz, g a differentiated Gaussian, so
    # p = amplitude dz sqrt(2e) tau/2 exp(-u^2) and p'' = -amplitude dz sqrt(2e)/tau (1 - 2u^2) exp(-u^2).
    pulse0 = design_pulse("diff_gaussian", 0.0, 12e9)  # 25 cells per wavelength at f_max
    pulse = Pulse(kind=pulse0.kind, tau=pulse0.tau, t0=4.0 * pulse0.tau)
    box = bare_box((24, 12, 12), steps=250, pulse=pulse, source=(4, 6, 6),
                   probes=(("r8", (12, 6, 6)), ("r12", (16, 6, 6)), ("r16", (20, 6, 6))))
    ref = compute_reference(box)
    t = np.arange(box.steps + 1) * box.dt
    errors = []
    for name, cells in (("r8", 8), ("r12", 12), ("r16", 16)):
        r = cells * D
        u = (t - r / C0 - pulse.t0) / pulse.tau
        envelope = np.exp(-u * u)
        a = math.sqrt(2 * math.e)
        p = D * a * pulse.tau / 2 * envelope
        p1 = D * (-a * u * envelope)
        p2 = D * (-a / pulse.tau * (1 - 2 * u * u) * envelope)
        expected = -(p / r**3 + p1 / (C0 * r**2) + p2 / (C0**2 * r)) / (4 * math.pi * EPS0)
        errors.append(np.abs(ref.probes[name] - expected).max() / np.abs(expected).max())
    # the grid's point dipole departs from the ideal one by O((d/r)^2) near the source
    # (measured: 4 %, 1.4 %, 0.7 %), so the error falls with distance and is small beyond 10 cells
    assert errors[0] > errors[1] > errors[2]
    assert errors[0] < 0.06 and errors[1] < 0.02 and errors[2] < 0.01


# --- the light-cone reference ---------------------------------------------------

@pytest.mark.parametrize("magnetic, source", [(False, None), (True, None), (False, (4, 6, 5)), (True, (4, 6, 5))])
def test_light_cone_reference_is_bitwise_the_full_reference(magnetic, source):
    # The reference is an eighth of the far-walled grid with mirror planes through the
    # source (the open-space field of a z-directed electric or magnetic dipole is even
    # or odd in each of them: image theory, any electromagnetics text), stepped in its
    # light-cone window; every probe and interior frame must equal the whole grid's
    # run bit for bit, on either side of the source.
    box = bare_box((10, 10, 10), steps=60, precision="float32", source=source,
                   probes=(("face", (8, 5, 5)), ("edge", (8, 5, 8)), ("corner", (8, 8, 8)),
                           ("low side", (1, 2, 3)), ("below", (5, 5, 1))))
    box = replace(box, source_magnetic=magnetic)
    windowed = compute_reference(box, window=True)
    full = compute_reference(box, window=False)
    for name, _ in box.probes:
        assert np.abs(full.probes[name]).max() > 0
        assert np.array_equal(windowed.probes[name], full.probes[name]), name
    assert np.array_equal(windowed.frames, full.frames)
    assert windowed.cell_updates < 0.02 * full.cell_updates
    # the reference's walls lie beyond reach: more than steps / 2 cells from the interior
    _, margin = reference_box(box)
    assert margin > box.steps / 2


def test_reference_cache_keeps_memory_and_disk_copies(tmp_path, monkeypatch):
    monkeypatch.setenv("QUIETLAYER_CACHE_DIR", str(tmp_path))
    box = bare_box((10, 10, 10), steps=40, precision="float32", probes=(("p", (8, 5, 5)),))
    first, source = Reference3DCache().get_with_source(box)
    assert source == "computed"
    cache = Reference3DCache()
    again, source = cache.get_with_source(box)
    assert source == "disk" and np.array_equal(again.probes["p"], first.probes["p"])
    assert cache.get_with_source(box)[1] == "memory"
    # the layer settings are not part of the reference's key; the problem is
    layered = replace(box, faces=(Side(cells=4),) * 6)
    assert layered.reference_key() == box.reference_key()
    assert replace(box, steps=41).reference_key() != box.reference_key()


# --- the box derived from a 2D scenario -----------------------------------------

def test_box_from_scenario_keeps_cell_band_host_and_layers():
    layer = Side(kind="cpml", cells=6, order=2, sigma_ratio=0.8, kappa_max=3, alpha_max=0.02)
    s = small_scenario(layer, eps_r=2.0, precision="float64")
    box = box_from_scenario(s)
    assert box.cells == (20, 20, 20) and box.source == (10, 10, 10)
    assert box.faces == (s.boundary.left, s.boundary.right, s.boundary.bottom, s.boundary.top,
                         s.boundary.right, s.boundary.right)
    assert box.eps_r == 2.0 and box.precision == "float64" and box.band == (0.0, 25e9)
    names = [n for n, _ in box.probes]
    positions = dict(box.probes)
    assert positions[names[0]] == (20 - FACE_GAP, 10, 10)  # face centre of the right face
    assert positions[names[1]] == (20 - FACE_GAP, 10, 20 - FACE_GAP)  # its edge with z high
    assert positions[names[2]] == (20 - FACE_GAP, 20 - FACE_GAP, 20 - FACE_GAP)  # the corner
    grid = build_grid3d(box)
    # psi only in the slabs: 6 half rows per x-slab pair side, 12 in all, etc.
    assert grid.psi[0].shape[0] == 12 and grid.psi[2].shape[1] == 12 and grid.psi[4].shape[2] == 12
    assert grid.psi[6].shape[0] == 12  # E: the nodes 1..6 and NX-6..NX-1


def test_periodic_scenarios_and_bad_sizes_get_a_clear_error():
    periodic = small_scenario(boundary=Boundary(bottom=Side(kind="periodic"), top=Side(kind="periodic")))
    with pytest.raises(ScenarioError, match=r"layer\.bottom\.kind.*'cpml' or 'wall'"):
        box_from_scenario(periodic)
    with pytest.raises(ScenarioError, match="half_width"):
        box_from_scenario(small_scenario(), half_width=2)
    walls = small_scenario(boundary=Boundary.all_sides(Side(kind="wall")))
    with pytest.raises(ScenarioError, match="at least one side of kind 'cpml'"):
        box_from_scenario(walls)


# --- the layer's echo ------------------------------------------------------------

@pytest.fixture(scope="module")
def small_confirmation():
    return confirm_3d(small_scenario(), late_steps=600, cache=Reference3DCache(use_disk=False))


def _earliest_echo_step(box: Box3D, probe) -> int:
    """Fewest steps for a change to go from the source to any layer and back to the
    probe, at one cell of L1 distance per step (the leapfrog's reach), less 2 for the
    half-cell offsets of the components."""
    best = math.inf
    for a in range(3):
        lateral = sum(abs(probe[b] - box.source[b]) for b in range(3) if b != a)
        for low in (True, False):
            if box.faces[2 * a + (0 if low else 1)] is None:
                continue
            d_src = box.source[a] if low else box.cells[a] - box.source[a]
            d_probe = probe[a] if low else box.cells[a] - probe[a]
            best = min(best, d_src + d_probe + lateral)
    return int(best) - 2


def test_difference_is_exactly_zero_before_the_earliest_echo(small_confirmation):
    # As in 2D (common practice, no source: the Yee grid's finite speed of information),
    # the test and reference runs agree bitwise until a change from the layer can arrive.
    c = small_confirmation
    cache = Reference3DCache(use_disk=False)
    ref, _ = cache.get_with_source(c.box)
    run = run_box(build_grid3d(c.box))
    for name, position in c.box.probes:
        err = run.probes[name] - ref.probes[name]
        first = _earliest_echo_step(c.box, position)
        assert first > 10
        assert np.all(err[:first] == 0.0), name
        assert np.abs(err).max() > 0.0, name


def test_scores_are_finite_and_late_time_is_stable(small_confirmation):
    c = small_confirmation
    assert set(c.peak_db) == {n for n, _ in c.box.probes}
    assert all(-150 < v < -20 for v in c.peak_db.values())
    assert c.worst_peak_db == max(c.peak_db.values())
    assert -200 < c.global_db < -20
    assert c.late.status == "stable"
    assert c.freqs.min() >= 0 and c.freqs.max() <= 25e9
    assert set(c.band_worst_db) == set(c.peak_db)


def test_face_probe_agrees_with_the_2d_normal_incidence_measurement():
    # The same layer seen at normal incidence by the 2D bench and by the 3D face probe,
    # in a box wide enough that the echoes of the other faces arrive after the face's own.
    # The echo-to-incident ratio is R times the spreading from the direct distance to the
    # image distance: (r/r_img)^(1/2) for the 2D line source far field, r/r_img for the
    # 3D point source (any antenna text); corrected for that, the two agree within 3 dB.
    layer = Side(kind="cpml", cells=4, order=3, sigma_ratio=0.5)
    s = small_scenario(layer)
    m2 = measure(s, parts={"probes"}).peak_db["normal"]
    box = box_from_scenario(s, lateral=24)
    c = confirm_3d(s, box=box, late_steps=0, cache=Reference3DCache(use_disk=False))
    face = c.peak_db[box.probes[0][0]]
    r_direct, r_image = 7.0, 13.0
    spread = 10 * math.log10(r_image / r_direct)
    assert abs((face + 2 * spread) - (m2 + spread)) < 3.0


def test_tez_runs_a_magnetic_dipole_and_records_hz():
    s = small_scenario(polarization="TEz")
    c = confirm_3d(s, late_steps=0, cache=Reference3DCache(use_disk=False))
    assert c.box.source_magnetic and c.box.quantity == "Hz (A/m)"
    assert all(-150 < v < -20 for v in c.peak_db.values())


# --- the command line and the page's panel ----------------------------------------

def _scenario_file(tmp_path, s: Scenario):
    path = tmp_path / "cell.toml"
    path.write_text(s.to_toml(), "utf-8")
    return str(path)


def test_check_3d_json_scores_exit_codes(tmp_path, monkeypatch, capsys):
    import json

    from quietlayer.app.cli import main
    from quietlayer.engine.confirm3d import DEFAULT_CACHE
    monkeypatch.setenv("QUIETLAYER_CACHE_DIR", str(tmp_path / "cache"))
    DEFAULT_CACHE.clear_memory()
    path = _scenario_file(tmp_path, small_scenario())
    assert main(["check", path, "--3d", "--json", "--late-steps", "300", "--budget", "-20"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["mode"] == "3d" and data["passed"] and data["late_time"]["steps"] == 300
    assert data["late_time"]["status"] == "stable"
    assert len(data["probes"]) == 3 and all(p["peak_db"] < -20 for p in data["probes"].values())
    assert data["worst_peak_db"] == max(p["peak_db"] for p in data["probes"].values())
    assert data["global_db"] < -20 and data["box"]["interior_cells"] == [20, 20, 20]
    assert data["timing_s"]["reference_from"] == "computed"
    # a budget below the worst peak error fails (exit 1); the reference now comes from disk
    DEFAULT_CACHE.clear_memory()
    assert main(["check", path, "--3d", "--json", "--no-late", "--budget", "-150"]) == 1
    data = json.loads(capsys.readouterr().out)
    assert not data["passed"] and "above the budget" in data["reasons"][0] and data["late_time"] is None
    assert data["timing_s"]["reference_from"] == "disk"


def test_check_3d_late_steps_given_explicitly_are_kept():
    # --late-steps 20000 (the 2D default's value) given on purpose must not fall back to the
    # 3D default of 4000; only an absent option does (common practice, no source)
    from quietlayer.app.cli import build_parser
    from quietlayer.app.confirm3d import late_steps_3d
    from quietlayer.engine.confirm3d import LATE_STEPS_3D
    parse = lambda *extra: build_parser().parse_args(["check", "cell.toml", *extra])
    assert late_steps_3d(parse("--3d", "--late-steps", "20000")) == 20_000
    assert late_steps_3d(parse("--3d", "--late-steps", "300")) == 300
    assert late_steps_3d(parse("--3d")) == LATE_STEPS_3D
    assert late_steps_3d(parse("--3d", "--no-late", "--late-steps", "20000")) == 0


def test_check_3d_text_and_bad_input(tmp_path, monkeypatch, capsys):
    from quietlayer.app.cli import main
    monkeypatch.setenv("QUIETLAYER_CACHE_DIR", str(tmp_path / "cache"))
    assert main(["check", _scenario_file(tmp_path, small_scenario()), "--3d", "--no-late"]) == 0
    out = capsys.readouterr().out
    assert "confirmation in 3D" in out and "20 x 20 x 20 interior cells" in out and "PASS" in out
    assert "certifies no RF-exposure" in out
    periodic = small_scenario(boundary=Boundary(bottom=Side(kind="periodic"), top=Side(kind="periodic")))
    assert main(["check", _scenario_file(tmp_path, periodic), "--3d"]) == 2
    assert "layer.bottom.kind" in capsys.readouterr().err


def test_page_panel_runs_cancels_and_marks_old_scores():
    from quietlayer.app.confirm3d_view import Confirm3DView
    current = {"s": small_scenario()}
    view = Confirm3DView(lambda: current["s"], lambda function, *args: function(*args))
    assert "20 x 20 x 20 interior cells" in view.box_line.object
    try:
        view.start()
        view.pool.submit(lambda: None).result(timeout=300)  # the run is done
        assert view.result is not None and view.w_run.disabled is False
        assert "Done in" in view.status.object and "-" in view.scores.object and len(view.plot.objects) == 1
        assert "earlier setting" not in view.scores.object
        current["s"] = small_scenario(courant=0.9)
        view.scenario_changed()
        assert "earlier setting" in view.scores.object
        # cancel: the worker stops at its next progress report
        view.start()
        view.cancel()
        view.pool.submit(lambda: None).result(timeout=300)
        assert view.status.object.startswith("Cancelled") or "Done" in view.status.object
    finally:
        view.close()


def test_a_pulse_too_long_for_a_3d_check_is_refused_with_the_reason():
    fine = small_scenario(source=Source(x=50, y=60, f_max=2e9))  # 150 cells per wavelength
    with pytest.raises(ScenarioError, match=r"source\.f_max.*cells per wavelength"):
        box_from_scenario(fine)


def test_two_threads_give_bitwise_the_one_thread_fields():
    # rows are independent within a half step, so splitting them between threads changes nothing
    box = box_from_scenario(small_scenario())
    grid = build_grid3d(box)
    one, two = run_box(grid, 60, threads=1), run_box(grid, 60, threads=2)
    for name, _ in box.probes:
        assert np.abs(one.probes[name]).max() > 0
        assert np.array_equal(one.probes[name], two.probes[name])
    small = bare_box((10, 10, 10), steps=40, precision="float32", probes=(("p", (8, 5, 5)),))
    assert np.array_equal(compute_reference(small, threads=1).probes["p"],
                          compute_reference(small, threads=2).probes["p"])
