"""Measure a layer: isolate its echo against the reference and score it.

    m = measure(scenario)                 # everything
    m = measure(scenario, parts={"probes"})   # only what one plot needs

Scores (all amplitudes relative to the reference, in dB):
- peak error per probe: 20 log10(max_t |test - ref| / max_t |ref|);
- global error: 10 log10(sum (test - ref)^2 / sum ref^2) over the interior
  nodes at the frame steps of the run;
- error versus time per probe, floored at FLOOR_DB;
- reflection spectrum per probe |FFT(test - ref)| / |FFT(ref)| over
  f_min..f_max, masked where the reference is more than 40 dB below its peak;
- reflection versus incidence angle: each probe is given the specular angle
  of its nearest CPML face (image source); the incident field is carried from
  the probe's distance to the image distance with the 2D Green's function
  H0^(2)(k r) (scipy.special.hankel2) before the ratio is taken, and the ratio
  is averaged over the band weighted by the incident spectrum;
- for a plane wave (line source across a periodic axis), the normal-incidence
  reflection spectrum, directly comparable with theory.layer_reflection;
- a late-time check of field energy for instability.
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np
from scipy.special import hankel2

from . import backend
from .errors import DivergenceError
from .grid import build_grid
from .reference import DEFAULT_CACHE, ReferenceCache, frame_every
from .scenario import SIDES, Boundary, Scenario, Side
from .simulate import simulate
from .theory import layer_reflection
from .units import C0

ALL_PARTS = frozenset({"probes", "band", "spectra", "angles", "global", "snapshots", "late_time"})
FLOOR_DB = -200.0
SPECTRUM_MASK_DB = -40.0
LATE_STEPS = 20_000
GROWTH_LIMIT_DB = 1.0  # per 1000 steps, over the last half of the late run


def to_db(ratio, floor: float = FLOOR_DB):
    """20 log10 of an amplitude ratio, with a floor."""
    with np.errstate(divide="ignore"):
        return np.maximum(20.0 * np.log10(np.abs(ratio)), floor)


@dataclass
class AngleCurve:
    names: list
    sides: list
    angles_deg: np.ndarray
    measured_db: np.ndarray
    theory_db: np.ndarray


@dataclass
class LateTime:
    """Energy long after the pulse: status 'stable', 'growing' or 'diverged'."""

    status: str
    steps: int
    growth_db_per_1000: float
    final_db: float  # total energy at the end relative to its peak, dB (10 log10)
    energy_steps: np.ndarray
    interior_energy: np.ndarray
    layer_energy: np.ndarray
    message: str = ""


@dataclass
class Measurement:
    scenario: Scenario
    times: np.ndarray
    peak_db: dict = field(default_factory=dict)
    error_db: dict = field(default_factory=dict)
    worst_peak_db: float = math.nan
    worst_probe: str = ""
    global_db: float = math.nan
    freqs: np.ndarray | None = None
    spectra: dict = field(default_factory=dict)
    band_worst_db: dict = field(default_factory=dict)  # per probe, largest in-band reflection, dB
    theory_spectra: dict = field(default_factory=dict)  # |R(theta_probe, f)| of the nearest face
    probe_angles: dict = field(default_factory=dict)  # degrees, specular angle on the nearest face
    angles: AngleCurve | None = None
    plane_wave: dict | None = None  # {"freqs", "measured", "theory"} amplitude ratios
    frame_steps: np.ndarray | None = None
    total_frames: np.ndarray | None = None  # whole test grid
    reflected_frames: np.ndarray | None = None  # interior only: test - ref
    late: LateTime | None = None
    test_s: float = 0.0
    reference_s: float = 0.0
    reference_cached: bool = False
    elapsed_s: float = 0.0
    engine: str = "compiled"  # "numpy" while the kernels were still being compiled (backend.py)


def _with_layer(s: Scenario, layer) -> Scenario:
    if layer is None:
        return s
    if isinstance(layer, Boundary):
        return s.with_changes(boundary=layer)
    if isinstance(layer, Side):
        b = s.boundary
        sides = {n: (getattr(b, n) if getattr(b, n).kind == "periodic" else layer) for n in SIDES}
        return s.with_changes(boundary=Boundary(**sides))
    raise TypeError("layer must be a Side, a Boundary or None")


def _nearest_face(s: Scenario, x: int, y: int):
    """(side, distance to the face, offset along it) of the nearest CPML face."""
    best = None
    for name in SIDES:
        if getattr(s.boundary, name).kind != "cpml":
            continue
        dist, along = _nearest_face_distance(s, name, x, y)
        if best is None or dist < best[1]:
            best = (name, dist, along)
    return best


def _spectrum_axis(s: Scenario):
    n = 1 << int(math.ceil(math.log2(4 * (s.steps + 1))))
    freqs = np.fft.rfftfreq(n, s.dt)
    band = (freqs >= max(s.source.f_min, freqs[1])) & (freqs <= s.source.f_max)
    return n, freqs, band


def late_time_check(s: Scenario, steps: int = LATE_STEPS, progress=None) -> LateTime:
    """Run long after the pulse and report the energy trend.

    progress(step, total) may return False to cancel (raises RunCancelled)."""
    long = s.with_changes(steps=steps, probes=())
    check = max(100, steps // 200)
    try:
        r = simulate(long, check_every=check, progress=progress)
    except DivergenceError as exc:
        return LateTime(status="diverged", steps=steps, growth_db_per_1000=math.inf, final_db=math.inf,
                        energy_steps=np.zeros(0, int), interior_energy=np.zeros(0), layer_energy=np.zeros(0),
                        message=str(exc))
    return energy_trend(steps, r.energy_steps, r.energy, r.interior_energy)


def energy_trend(steps: int, energy_steps, total, interior) -> LateTime:
    """The late-time verdict from a long run's energy record: the slope of the
    energy (dB) over the last half of the run, 'growing' above GROWTH_LIMIT_DB
    per 1000 steps."""
    peak = total.max() if total.size else 0.0
    half = energy_steps >= steps // 2
    level = 10 * np.log10(np.maximum(total, 1e-300 * max(peak, 1e-300)) / max(peak, 1e-300))
    if half.sum() >= 2:
        slope = np.polyfit(energy_steps[half], level[half], 1)[0] * 1000.0
    else:
        slope = 0.0
    status = "growing" if slope > GROWTH_LIMIT_DB else "stable"
    message = (f"energy grows {slope:.2g} dB per 1000 steps late in the run" if status == "growing"
               else f"energy falls to {level[-1]:.0f} dB of its peak and stays there")
    return LateTime(status=status, steps=steps, growth_db_per_1000=float(slope), final_db=float(level[-1]),
                    energy_steps=energy_steps, interior_energy=interior,
                    layer_energy=np.maximum(total - interior, 0.0), message=message)


def measure(scenario: Scenario, layer=None, parts=ALL_PARTS, *, cache: ReferenceCache | None = None,
            late_steps: int = LATE_STEPS, threads: int | None = None, progress=None) -> Measurement:
    """Measure the layer of `scenario` (or `layer` put on its non-periodic sides).

    parts: any of ALL_PARTS; the headline scores ('probes') are always made;
    'band' gives the spectra and their worst in-band value without the theory
    curves beside them ('spectra' gives both).
    progress(stage, step, total), stage 'reference' (only while it is computed)
    or 'test': called every 100 steps; return False to cancel (RunCancelled).
    """
    t_start = time.perf_counter()
    s = _with_layer(scenario, layer)
    parts = set(parts) | {"probes"}
    unknown = parts - ALL_PARTS
    if unknown:
        raise ValueError(f"unknown parts {sorted(unknown)}; allowed: {sorted(ALL_PARTS)}")
    def stage(name):
        return None if progress is None else (lambda step, total: progress(name, step, total))

    ref, source = (cache or DEFAULT_CACHE).get_with_source(s, progress=stage("reference"))
    cached = source != "computed"
    every = frame_every(s)
    want_frames = bool(parts & {"global", "snapshots"})
    grid = build_grid(s)
    # the images need the whole grid; the global score only the interior
    window = None if "snapshots" in parts else grid.interior_slice()
    run = simulate(s, snapshot_every=every if want_frames else 0, threads=threads, grid=grid,
                   snapshot_window=window, progress=stage("test"))
    m = Measurement(scenario=s, times=run.times, test_s=run.elapsed_s,
                    reference_s=0.0 if cached else ref.elapsed_s, reference_cached=cached, engine=run.engine)

    # per-probe scores
    errors = {}
    for p in s.probes:
        test, refp = run.probes[p.name], ref.probes[p.name]
        err = test - refp
        errors[p.name] = err
        scale = np.abs(refp).max()
        m.peak_db[p.name] = float(to_db(np.abs(err).max() / scale)) if scale > 0 else math.nan
        m.error_db[p.name] = to_db(err / scale) if scale > 0 else np.full(err.shape, FLOOR_DB)
    finite = {k: v for k, v in m.peak_db.items() if math.isfinite(v)}
    if finite:
        m.worst_probe = max(finite, key=finite.get)
        m.worst_peak_db = finite[m.worst_probe]

    if want_frames:
        test_inside = run.snapshots if window is not None else run.snapshots[(slice(None),) + grid.interior_slice()]
        if "global" in parts:
            err, total = backend.loops().squared_error_sums(np.ascontiguousarray(test_inside).reshape(-1),
                                                    ref.frames.reshape(-1))
            if total > 0:
                m.global_db = float(10 * np.log10(max(err / total, 10 ** (FLOOR_DB / 10))))
        if "snapshots" in parts:
            m.frame_steps = run.snapshot_steps
            m.total_frames = run.snapshots
            m.reflected_frames = test_inside - ref.frames.astype(float)

    if parts & {"band", "spectra", "angles"}:
        n, freqs, band = _spectrum_axis(s)
        ref_spectra = {p.name: np.fft.rfft(ref.probes[p.name], n) for p in s.probes}
        err_spectra = {p.name: np.fft.rfft(errors[p.name], n) for p in s.probes}
        if parts & {"band", "spectra"}:
            m.freqs = freqs[band]
            for p in s.probes:
                rs = np.abs(ref_spectra[p.name][band])
                ratio = np.abs(err_spectra[p.name][band]) / np.where(rs > 0, rs, np.inf)
                masked = rs < np.abs(ref_spectra[p.name]).max() * 10 ** (SPECTRUM_MASK_DB / 20)
                m.spectra[p.name] = np.where(masked, np.nan, ratio)
                if not masked.all():
                    m.band_worst_db[p.name] = float(to_db(np.nanmax(m.spectra[p.name])))
                geometry = _specular(s, p) if "spectra" in parts else None
                if geometry is not None:
                    side, angle = geometry[0], geometry[1]
                    m.probe_angles[p.name] = math.degrees(angle)
                    m.theory_spectra[p.name] = layer_reflection(s, side, m.freqs, angle)
            if s.source.line and s.probes and "spectra" in parts:
                m.plane_wave = _plane_wave(s, freqs[band], m.spectra)
        if "angles" in parts and not s.source.line:
            m.angles = _angle_curve(s, freqs, band, ref_spectra, err_spectra)

    if "late_time" in parts:
        m.late = late_time_check(s, late_steps)
    m.elapsed_s = time.perf_counter() - t_start
    return m


def _plane_wave(s: Scenario, freqs, spectra) -> dict:
    """Normal-incidence reflection for a line source across a periodic axis."""
    first = s.probes[0]
    face = _nearest_face(s, first.x, first.y)
    theory = layer_reflection(s, face[0], freqs, 0.0) if face else np.full(freqs.shape, np.nan)
    return {"probe": first.name, "side": face[0] if face else "", "freqs": freqs,
            "measured": spectra[first.name], "theory": theory}


def _angle_curve(s: Scenario, freqs, band, ref_spectra, err_spectra) -> AngleCurve:
    k = 2 * math.pi * freqs[band] * math.sqrt(s.eps_r) / C0
    names, sides, angles, measured, theory = [], [], [], [], []
    for p in s.probes:
        geometry = _specular(s, p)
        if geometry is None:
            continue
        side, angle, r_img, r_dir = geometry
        if r_dir == 0 or r_img == 0:
            continue
        carry = np.abs(hankel2(0, k * r_img) / hankel2(0, k * r_dir))
        incident = np.abs(ref_spectra[p.name][band]) * carry
        weight = incident**2
        if weight.sum() == 0:
            continue
        reflected = np.abs(err_spectra[p.name][band])
        r_theory = layer_reflection(s, side, freqs[band], angle)
        names.append(p.name)
        sides.append(side)
        angles.append(math.degrees(angle))
        measured.append(float(10 * np.log10((reflected**2).sum() / weight.sum())))
        theory.append(float(10 * np.log10(max((r_theory**2 * weight).sum() / weight.sum(), 1e-300))))
    order = np.argsort(angles)
    pick = lambda seq: [seq[i] for i in order]
    return AngleCurve(names=pick(names), sides=pick(sides), angles_deg=np.asarray(angles)[order],
                      measured_db=np.asarray(measured)[order], theory_db=np.asarray(theory)[order])


def _specular(s: Scenario, p):
    """(side, angle, image distance, direct distance) of the echo reaching probe
    p from its nearest CPML face, by the image-source construction."""
    face = _nearest_face(s, p.x, p.y)
    if face is None:
        return None
    side, d_probe, along_probe = face
    src = s.source
    d_src, along_src = _nearest_face_distance(s, side, src.x, src.y)
    normal = d_probe + d_src
    tangential = abs(along_probe - along_src)
    d_normal, d_along = (s.dx, s.dy) if side in ("left", "right") else (s.dy, s.dx)
    r_img = math.hypot(normal * d_normal, tangential * d_along)
    r_dir = math.hypot((p.x - src.x) * s.dx, (p.y - src.y) * s.dy)
    return side, math.atan2(tangential * d_along, normal * d_normal), r_img, r_dir


def _nearest_face_distance(s: Scenario, side: str, x: int, y: int):
    """(distance to `side`'s face, offset along it) of node (x, y), in cells."""
    return {"left": (x, y), "right": (s.nx - x, y), "bottom": (y, x), "top": (s.ny - y, x)}[side]
