"""Grading and recursive-convolution coefficients against their formulas."""

import math
from decimal import Decimal, getcontext

import numpy as np
import pytest

from quietlayer.engine import (EPS0, ETA0, Boundary, Probe, Profile, Scenario, Side, Source,
                               build_grid, layer_table, recursive_convolution, sigma_opt, simulate)


def scenario(side, **kw):
    base = dict(dx=1e-3, dy=2e-3, nx=40, ny=30, steps=250, precision="float64",
                source=Source(x=20, y=15, f_max=8e9), probes=(Probe("p", 5, 15), Probe("q", 20, 2)),
                boundary=Boundary.all_sides(side))
    base.update(kw)
    return Scenario(**base)


def test_sigma_opt_formula():
    # sigma_opt = 0.8 (m + 1) / (eta0 dx sqrt(eps_r)) (Taflove & Hagness), which is
    # (m + 1) / (150 pi dx sqrt(eps_r)) to 0.1 % since eta0 ~ 120 pi.
    for m, dx, eps_r in [(3, 1e-3, 1.0), (4, 2e-6, 4.0), (2.5, 0.01, 9.0)]:
        value = sigma_opt(m, dx, eps_r)
        assert value == pytest.approx(0.8 * (m + 1) / (ETA0 * dx * math.sqrt(eps_r)), rel=1e-15)
        assert value == pytest.approx((m + 1) / (150 * math.pi * dx * math.sqrt(eps_r)), rel=1e-3)


def test_polynomial_grading_at_node_and_half_node_depths():
    # sigma = sigma_max (rho/L)^m, kappa = 1 + (kappa_max - 1)(rho/L)^m,
    # alpha = alpha_max ((L - rho)/L)^m_a (Berenger 1994; Roden & Gedney 2000).
    side = Side(cells=8, order=3.0, sigma_ratio=1.5, kappa_max=7.0, alpha_max=0.05, alpha_order=2.0)
    s = scenario(side, eps_r=2.0)
    t = layer_table(s, "bottom")  # normal to y: the cell is dy
    L = 8 * s.dy
    smax = 1.5 * sigma_opt(3.0, s.dy, 2.0)
    assert t.sigma_max == pytest.approx(smax)
    for depth, sig, kap, alp in [(t.node_depth, t.node_sigma, t.node_kappa, t.node_alpha),
                                 (t.half_depth, t.half_sigma, t.half_kappa, t.half_alpha)]:
        x = depth / L
        np.testing.assert_allclose(sig, smax * x**3, rtol=1e-14)
        np.testing.assert_allclose(kap, 1 + 6.0 * x**3, rtol=1e-14)
        np.testing.assert_allclose(alp, 0.05 * (1 - x) ** 2, rtol=1e-14, atol=1e-18)
    np.testing.assert_allclose(t.node_depth, np.arange(9) * s.dy)
    np.testing.assert_allclose(t.half_depth, (np.arange(8) + 0.5) * s.dy)


def _reference_bc(sigma, kappa, alpha, dt):
    """b and c in 40-digit decimal arithmetic (Roden & Gedney 2000)."""
    getcontext().prec = 40
    s, k, a = Decimal(sigma), Decimal(kappa), Decimal(alpha)
    b = (-(s / k + a) * Decimal(dt) / Decimal(EPS0)).exp()
    c = s * (b - 1) / (s * k + k * k * a) if sigma > 0 else Decimal(0)
    return float(b), float(c)


@pytest.mark.parametrize("sigma, kappa, alpha", [
    (1.0, 1.0, 0.0), (25.0, 4.0, 0.05), (1e-6, 1.0, 0.0), (1e-9, 3.0, 1e-7), (0.0, 2.0, 0.1), (5e3, 15.0, 0.0)])
def test_recursive_convolution_coefficients(sigma, kappa, alpha):
    dt = 1.9e-12
    b, c = recursive_convolution(np.array([sigma]), np.array([kappa]), np.array([alpha]), dt)
    b_ref, c_ref = _reference_bc(sigma, kappa, alpha, dt)
    assert b[0] == pytest.approx(b_ref, rel=1e-14)
    # expm1 keeps c accurate even where b - 1 would cancel catastrophically
    assert c[0] == pytest.approx(c_ref, rel=1e-12, abs=1e-300)


def test_layers_are_mirror_images_on_the_grid():
    s = scenario(Side(cells=6, order=2.0, kappa_max=3.0))
    g = build_grid(s)
    assert np.array_equal(g.gxn, g.gxn[::-1])
    assert np.array_equal(g.gxh, g.gxh[::-1])
    assert np.array_equal(g.gyn, g.gyn[::-1])
    assert g.gxn[10] == pytest.approx(1 / s.dx)  # interior: kappa = 1
    assert g.gxn[0] == pytest.approx(1 / (3.0 * s.dx))  # wall node: kappa_max


def test_psi_lives_only_in_the_layer():
    s = scenario(Side(cells=6))
    g = build_grid(s)
    NX, NY = g.cells
    sx_lo, sx_hi, px_lo, px_hi = g.x_slabs[:4]
    assert sx_lo[3].shape == sx_hi[3].shape == (6, NY + 1)  # rows of the layer, every column
    # y-slabs are padded to whole vector blocks towards the interior, with zeros
    start, b, c, psi, coef = g.y_slabs[3]
    assert psi.shape == (NX + 1, 16) and start == NY - 16
    assert np.all(b[:10] == 0) and np.all(c[:10] == 0) and np.all(b[10:] > 0)
    assert (sx_lo[0], sx_hi[0]) == (0, NX - 6)  # half nodes 1/2..5+1/2 and their mirror
    assert (px_lo[0], px_hi[0]) == (1, NX - 6)  # nodes 1..6 (depths 5..0); the wall stays zero
    total = sum(a[3].size for a in g.x_slabs[:4] + g.y_slabs[:4])
    assert total < 0.5 * (NX + 1) * (NY + 1) * 4  # no full-grid psi arrays


@pytest.mark.parametrize("ny", [6, 12, 30])
def test_padded_y_slabs_never_reach_each_other(ny):
    # The kernels update a y-slab's columns in the same loop as the field, so
    # the padding of one slab may not cover columns of the other (nor the
    # wall column 0 of P); a narrow grid keeps the layer cells unpadded.
    g = build_grid(scenario(Side(cells=10), ny=ny, source=Source(x=20, y=ny // 2, f_max=8e9),
                            probes=(Probe("p", 5, ny // 2),)))
    NY = g.cells[1]
    for (lo_start, lo_b, *_), (hi_start, hi_b, *_), first in ((g.y_slabs[0], g.y_slabs[1], 0),
                                                            (g.y_slabs[2], g.y_slabs[3], 1)):
        assert lo_start >= first and lo_start + lo_b.size <= hi_start
        assert hi_start + hi_b.size <= NY
        assert np.count_nonzero(lo_b) == np.count_nonzero(hi_b) == 10  # padding is b = 0


def test_user_profile_at_exact_nodes_reproduces_the_graded_layer():
    # A tabulated profile sampled at every node and half node is the same layer.
    side = Side(cells=10, order=3.0, sigma_ratio=1.0, kappa_max=4.0, alpha_max=0.03)
    graded = scenario(side, dy=1e-3)
    t = layer_table(graded, "left")
    depth = np.sort(np.concatenate([t.node_depth, t.half_depth]))
    order = np.argsort(np.concatenate([t.node_depth, t.half_depth]))
    pick = lambda a, b: tuple(np.concatenate([a, b])[order])
    profile = Profile(depth=tuple(depth), sigma=pick(t.node_sigma, t.half_sigma),
                      kappa=pick(t.node_kappa, t.half_kappa), alpha=pick(t.node_alpha, t.half_alpha))
    tabulated = scenario(Side(cells=10, profile=profile), dy=1e-3)
    a, b = simulate(graded), simulate(tabulated)
    for name in a.probes:
        assert np.array_equal(a.probes[name], b.probes[name])
