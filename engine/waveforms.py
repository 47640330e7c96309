"""Source pulses designed from a band of interest.

Design rule (common practice, no source): the pulse spectrum falls to -20 dB
of its peak at f_max (and, for the modulated Gaussian, also at f_min), so the
band of interest carries most of the energy and the grid is asked to resolve
little beyond f_max.  Each pulse starts 5.5 envelope widths before its peak,
where the envelope is below 1e-13: the switch-on is invisible even in float64.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.optimize import brentq

from .errors import ScenarioError

WAVEFORMS = ("gaussian", "diff_gaussian", "ricker", "modulated_gaussian")
DESIGN_LEVEL = 0.1  # -20 dB in amplitude
_START = 5.5  # envelope widths between switch-on and the pulse centre


def _normalised_spectrum(kind: str, f: np.ndarray, tau: float, f_c: float) -> np.ndarray:
    f = np.abs(np.asarray(f, dtype=float))
    if kind == "gaussian":
        return np.exp(-((math.pi * f * tau) ** 2))
    if kind == "diff_gaussian":
        x = f * math.sqrt(2.0) * math.pi * tau  # f / f_peak
        return x * np.exp((1.0 - x * x) / 2.0)
    if kind == "ricker":
        x = f * math.pi * tau
        return x * x * np.exp(1.0 - x * x)
    lo = np.exp(-((math.pi * (f - f_c) * tau) ** 2))
    hi = np.exp(-((math.pi * (f + f_c) * tau) ** 2))
    peak = 1.0 - math.exp(-((2.0 * math.pi * f_c * tau) ** 2))
    return (lo - hi) / peak


def _edge_ratio(shape) -> float:
    """x > 1 where shape(x) falls to DESIGN_LEVEL (x = f / f_peak)."""
    return brentq(lambda x: shape(x) - DESIGN_LEVEL, 1.0, 10.0, xtol=1e-14)


_DIFF_GAUSS_EDGE = _edge_ratio(lambda x: x * math.exp((1 - x * x) / 2))
_RICKER_EDGE = _edge_ratio(lambda x: x * x * math.exp(1 - x * x))


@dataclass(frozen=True)
class Pulse:
    """A designed source pulse: g(t), its normalised spectrum and its timing.

    kind: one of WAVEFORMS; tau: envelope width (s); t0: time of the centre (s);
    f_c: carrier frequency (Hz, modulated Gaussian only, else 0).
    """

    kind: str
    tau: float
    t0: float
    f_c: float = 0.0

    def __call__(self, t) -> np.ndarray:
        u = (np.asarray(t, dtype=float) - self.t0) / self.tau
        envelope = np.exp(-u * u)
        if self.kind == "gaussian":
            return envelope
        if self.kind == "diff_gaussian":
            return -math.sqrt(2.0 * math.e) * u * envelope
        if self.kind == "ricker":
            return (1.0 - 2.0 * u * u) * envelope
        return np.sin(2.0 * math.pi * self.f_c * (np.asarray(t, dtype=float) - self.t0)) * envelope

    def spectrum(self, f) -> np.ndarray:
        """|G(f)| normalised to 1 at its peak (analytic Fourier transform)."""
        return _normalised_spectrum(self.kind, f, self.tau, self.f_c)

    @property
    def end_time(self) -> float:
        """Time after which the pulse is below 1e-13 of its peak."""
        return self.t0 + _START * self.tau

    @property
    def peak_frequency(self) -> float:
        if self.kind == "gaussian":
            return 0.0
        if self.kind == "diff_gaussian":
            return 1.0 / (math.sqrt(2.0) * math.pi * self.tau)
        if self.kind == "ricker":
            return 1.0 / (math.pi * self.tau)
        return self.f_c


def design_pulse(kind: str, f_min: float, f_max: float) -> Pulse:
    """Pulse whose spectrum covers f_min..f_max by the -20 dB rule above."""
    if kind not in WAVEFORMS:
        raise ScenarioError("source.waveform", kind, f"one of {', '.join(WAVEFORMS)}")
    if not (f_max > 0.0 and math.isfinite(f_max)):
        raise ScenarioError("source.f_max", f_max, "a finite frequency > 0 Hz")
    if not (0.0 <= f_min < f_max):
        raise ScenarioError("source.f_min", f_min, f"0 Hz <= f_min < f_max = {f_max:g} Hz")
    if kind == "gaussian":
        tau = math.sqrt(math.log(1.0 / DESIGN_LEVEL)) / (math.pi * f_max)
        f_c = 0.0
    elif kind == "diff_gaussian":
        f_peak = f_max / _DIFF_GAUSS_EDGE
        tau = 1.0 / (math.sqrt(2.0) * math.pi * f_peak)
        f_c = 0.0
    elif kind == "ricker":
        f_peak = f_max / _RICKER_EDGE
        tau = 1.0 / (math.pi * f_peak)
        f_c = 0.0
    else:
        if f_min <= 0.0:
            raise ScenarioError("source.f_min", f_min, "> 0 Hz for a modulated Gaussian (it has no DC content)")
        half_band = 0.5 * (f_max - f_min)
        tau = math.sqrt(math.log(1.0 / DESIGN_LEVEL)) / (math.pi * half_band)
        f_c = 0.5 * (f_max + f_min)
    return Pulse(kind=kind, tau=tau, t0=_START * tau, f_c=f_c)
