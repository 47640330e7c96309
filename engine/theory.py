"""Closed-form companions of the measurement.

- Reflection of a graded CFS layer backed by a conductor, continuous theory,
  round trip, for a propagating wave at angle theta (Berenger 1994; Roden &
  Gedney 2000; Taflove & Hagness):
      R(theta, f) = exp(-2 cos(theta) sqrt(eps_r)/c0
                        * integral_0^L w^2 eps0 sigma(x) / (alpha(x)^2 + w^2 eps0^2) dx)
  integrated numerically over the layer's actual profile (so it holds for
  user-supplied profiles too).  For alpha = 0 it is
      exp(-2 eta0 sqrt(eps_r) sigma_max L cos(theta) / (m + 1)).
  kappa does not enter for propagating waves.  It ignores discretisation.
- The sigma_max that gives a target R(0) for a thickness.
- The Yee dispersion relation (Taflove & Hagness) as a phase-velocity error.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.optimize import brentq

from .layer import grade, side_cell
from .scenario import Scenario
from .units import C0, EPS0, ETA0


_GAUSS_X, _GAUSS_W = np.polynomial.legendre.leggauss(16)


def _quadrature_nodes(side, cell: float):
    """Composite 16-point Gauss-Legendre nodes and weights over the layer:
    one panel per cell, split again at a user profile's own break points."""
    thickness = side.cells * cell
    edges = set(np.linspace(0.0, thickness, side.cells + 1))
    if side.profile is not None:
        edges |= {d for d in side.profile.depth if 0.0 < d < thickness}
    edges = np.array(sorted(edges))
    lo, hi = edges[:-1, None], edges[1:, None]
    x = 0.5 * (hi + lo) + 0.5 * (hi - lo) * _GAUSS_X[None, :]
    w = 0.5 * (hi - lo) * _GAUSS_W[None, :]
    return x.ravel(), w.ravel()


def layer_reflection(scenario: Scenario, side_name: str, frequencies, angle: float = 0.0) -> np.ndarray:
    """|R| of one side's layer at `frequencies` (Hz) for incidence `angle` (rad),
    continuous theory integrated over the layer's actual profile."""
    side = getattr(scenario.boundary, side_name)
    if side.kind != "cpml":
        raise ValueError(f"side {side_name} carries no CPML")
    cell = side_cell(scenario, side_name)
    x, w = _quadrature_nodes(side, cell)
    sigma, _, alpha = grade(side, cell, scenario.eps_r, x)
    omega = 2 * math.pi * np.atleast_1d(np.asarray(frequencies, dtype=float))[:, None]
    integrand = omega**2 * EPS0 * sigma[None, :] / (alpha[None, :] ** 2 + (omega * EPS0) ** 2 + 1e-300)
    integral = integrand @ w
    return np.exp(-2.0 * math.cos(angle) * math.sqrt(scenario.eps_r) / C0 * integral)


def polynomial_reflection(sigma_max: float, cells: int, cell: float, order: float,
                          eps_r: float = 1.0, angle: float = 0.0) -> float:
    """exp(-2 eta0 sqrt(eps_r) sigma_max L cos(theta) / (m + 1)) (alpha = 0)."""
    return math.exp(-2.0 * ETA0 * math.sqrt(eps_r) * sigma_max * cells * cell * math.cos(angle) / (order + 1))


def sigma_for_reflection(target_db: float, cells: int, cell: float, order: float, eps_r: float = 1.0) -> float:
    """sigma_max (S/m) whose normal-incidence R (alpha = 0) is target_db (amplitude dB)."""
    if target_db >= 0:
        raise ValueError("target_db must be below 0 dB")
    r = 10.0 ** (target_db / 20.0)
    return -(order + 1) * math.log(r) / (2.0 * ETA0 * math.sqrt(eps_r) * cells * cell)


def yee_phase_velocity_error(cells_per_wavelength: float, courant: float, angle: float = 0.0,
                             aspect: float = 1.0) -> float:
    """v_Yee / c - 1 for a plane wave resolved by `cells_per_wavelength` (cells of
    size dx; dy = aspect dx) at `courant` x the 2D limit, from the Yee
    dispersion relation (Taflove & Hagness):
        [sin(w dt/2)/(c dt)]^2 = [sin(kx dx/2)/dx]^2 + [sin(ky dy/2)/dy]^2."""
    dx = 1.0
    dy = aspect
    dt = courant / (C0 * math.sqrt(1 / dx**2 + 1 / dy**2))
    k0 = 2 * math.pi / (cells_per_wavelength * dx)
    omega = C0 * k0
    lhs = (math.sin(omega * dt / 2) / (C0 * dt)) ** 2

    def gap(k):
        return ((math.sin(k * math.cos(angle) * dx / 2) / dx) ** 2
                + (math.sin(k * math.sin(angle) * dy / 2) / dy) ** 2 - lhs)

    k = brentq(gap, 0.5 * k0, min(4.0 * k0, 0.999 * 2 * math.pi / max(dx, 1e-300)), xtol=1e-14 * k0)
    return k0 / k - 1.0
