"""Grading of the CFS-CPML and its recursive-convolution coefficients.

Grading with depth rho from the inner face in a layer of thickness L
(Berenger 1994; Roden & Gedney 2000; Taflove & Hagness):
    sigma = sigma_max (rho/L)^m
    kappa = 1 + (kappa_max - 1) (rho/L)^m
    alpha = alpha_max ((L - rho)/L)^m_a      (largest at the inner face)
Recursive convolution (Roden & Gedney 2000):
    b = exp(-(sigma/kappa + alpha) dt/eps0)
    c = sigma (b - 1) / (sigma kappa + kappa^2 alpha)   (0 where sigma = 0)
with b - 1 computed by expm1, which sets the error floor in float32.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from .scenario import SIDES, Scenario, Side
from .units import EPS0, ETA0


def sigma_opt(order: float, cell: float, eps_r: float = 1.0) -> float:
    """Common starting sigma_max, S/m: 0.8 (m + 1) / (eta0 d sqrt(eps_r))
    (Taflove & Hagness, polynomial grading)."""
    return 0.8 * (order + 1.0) / (ETA0 * cell * math.sqrt(eps_r))


def side_cell(scenario: Scenario, name: str) -> float:
    """Cell size normal to a side, m."""
    return scenario.dx if name in ("left", "right") else scenario.dy


def resolved_sigma_max(side: Side, cell: float, eps_r: float) -> float:
    """sigma_max in S/m, whether given directly or as a ratio to sigma_opt."""
    if side.sigma_max is not None:
        return side.sigma_max
    return side.sigma_ratio * sigma_opt(side.order, cell, eps_r)


def grade(side: Side, cell: float, eps_r: float, depth: np.ndarray):
    """sigma (S/m), kappa, alpha (S/m) at the given depths (m) from the inner face."""
    depth = np.asarray(depth, dtype=float)
    if side.profile is not None:
        p = side.profile
        return (np.interp(depth, p.depth, p.sigma), np.interp(depth, p.depth, p.kappa),
                np.interp(depth, p.depth, p.alpha))
    thickness = side.cells * cell
    x = np.clip(depth / thickness, 0.0, 1.0)
    xm = x ** side.order
    sigma = resolved_sigma_max(side, cell, eps_r) * xm
    kappa = 1.0 + (side.kappa_max - 1.0) * xm
    alpha = side.alpha_max * (1.0 - x) ** side.alpha_order
    return sigma, kappa, alpha


def recursive_convolution(sigma, kappa, alpha, dt: float):
    """b and c of the psi update psi <- b psi + c d/dx (Roden & Gedney 2000)."""
    sigma, kappa, alpha = (np.asarray(v, dtype=float) for v in (sigma, kappa, alpha))
    rate = (sigma / kappa + alpha) * (dt / EPS0)
    b = np.exp(-rate)
    b_minus_1 = np.expm1(-rate)
    denom = sigma * kappa + kappa * kappa * alpha
    with np.errstate(divide="ignore", invalid="ignore"):
        c = np.where(sigma > 0.0, sigma * b_minus_1 / np.where(denom > 0, denom, 1.0), 0.0)
    return b, c


@dataclass(frozen=True)
class LayerTable:
    """Coefficients of one side's layer at its node and half-node positions.

    Node positions lie at whole-cell depths 0..N (the inner face to the wall);
    half-node positions at (k + 1/2) cells.  In TMz the nodes carry Ez and the
    half nodes the tangential H; in TEz the nodes carry Hz and the half nodes
    the tangential E.  Units: depth m, sigma and alpha S/m; kappa, b, c none.
    """

    side: str
    node_depth: np.ndarray
    node_sigma: np.ndarray
    node_kappa: np.ndarray
    node_alpha: np.ndarray
    node_b: np.ndarray
    node_c: np.ndarray
    half_depth: np.ndarray
    half_sigma: np.ndarray
    half_kappa: np.ndarray
    half_alpha: np.ndarray
    half_b: np.ndarray
    half_c: np.ndarray
    sigma_max: float
    sigma_opt: float


def layer_table(scenario: Scenario, name: str) -> LayerTable | None:
    """The coefficient table of one side, or None if the side has no CPML."""
    side: Side = getattr(scenario.boundary, name)
    if side.kind != "cpml":
        return None
    cell = side_cell(scenario, name)
    n = side.cells
    node_depth = np.arange(n + 1, dtype=float) * cell
    half_depth = (np.arange(n, dtype=float) + 0.5) * cell
    out = {}
    for prefix, depth in (("node", node_depth), ("half", half_depth)):
        sigma, kappa, alpha = grade(side, cell, scenario.eps_r, depth)
        b, c = recursive_convolution(sigma, kappa, alpha, scenario.dt)
        out.update({f"{prefix}_depth": depth, f"{prefix}_sigma": sigma, f"{prefix}_kappa": kappa,
                    f"{prefix}_alpha": alpha, f"{prefix}_b": b, f"{prefix}_c": c})
    return LayerTable(side=name, sigma_max=resolved_sigma_max(side, cell, scenario.eps_r),
                      sigma_opt=sigma_opt(side.order, cell, scenario.eps_r), **out)


def layer_tables(scenario: Scenario) -> dict[str, LayerTable]:
    """Tables of every side that carries a CPML."""
    tables = {name: layer_table(scenario, name) for name in SIDES}
    return {k: v for k, v in tables.items() if v is not None}
