"""The demo lab's datasets: a few hundred invented images and spectra acquired on LTM-1 in the
measuring sessions of the demo, written as real files in open formats and ingested through the
real pipeline.

**Generators** (pure numpy, no Django, float32 out, SI units: heights in m, currents in A,
biases in V, frequency shifts in Hz). Their random numbers come from a generator they are
handed, seeded per acquisition, so the same seed gives the same array, and so the same bytes:

* atomic lattices: a hexagonal net (Cu(111), nearest neighbours 2.55 Å) as three plane waves
  whose FFT spots lie at 2/(√3·a), i.e. a row spacing of √3/2·a; a square net (Ag(100),
  2.89 Å) as two;
* terraces with monatomic steps (2.08 Å on Cu(111), 2.04 Å on Ag(100)) whose edges meander,
  uneven widths and rounded edges; a slow tilt and a small bow (piezo creep) on top;
* adsorbates: rectangular NaCl bilayer islands (3.5 Å apparent height, sometimes a third-layer
  patch) covering the area fraction the logged coverage says, C60 islands of whole molecules
  (7.5 Å bumps on a hexagonal close packing of 1.0 nm), point adsorbates (CO after a dose, a
  few residual-gas molecules otherwise) as shallow dips;
* scan noise (white, plus a random offset per line);
* current images: constant-height current over a lattice (exponential in the tip height) or
  the feedback error of a constant-current scan (the slope along the fast axis);
* point spectra: dI/dV(V) as a background plus a broadened step (the Cu(111) surface state at
  −0.44 V) or a peak, and the I(V) that is its integral, scaled to the stabilisation setpoint;
* small dI/dV grids (16×16×101) across a NaCl island edge; Δf images for the force sensor.

The nearest-neighbour distances and step heights are within 0.01 Å of the bulk-terminated
values of REFERENCES.md §6 and the Cu(111) onset is that of §8; everything else —
corrugations, apparent heights, the Ag(100) feature at +0.33 V, the interface state under NaCl
at −0.22 V, the C60 level at +0.62 V, noise levels — is invented to look plausible. The
exchange and HDF5 files say in their headers that they are synthetic.

**The step** (:func:`load_datasets`) takes the day plan of the sessions
(:func:`labbook.demo.logbook.planned_sessions`), gives each one to three acquisitions at times
inside it (outside cryogen transfers and CO doses), chooses what is measured from what was on
the stage then (the surface state after the demo's preparations: NaCl islands after a NaCl
deposition, C60 after a C60 deposition, a clean lattice after a cleaning) and from the tip in
the scanner (Δf images with the tuning-fork sensor), writes each as a file — mostly our
exchange layout, some ``.npy`` with the metadata sent beside it, now and then an HDF5 NXdata
file — into memory, and ingests it through ``datafiles.actions.ingest`` as the session's
operator on LTM-1. Processing (statistics, thumbnail) and lineage (sample, surface state, tip,
instrument state) then happen in the real code, on commit. Same seed, same bytes: a second run
ingests nothing new (ingestion dedupes by SHA-256), and a session whose acquisition times are
all on the instrument already is not generated at all. Invented data only (DESIGN.md §5).
"""

from __future__ import annotations

import io
import math
from collections import Counter
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from typing import TYPE_CHECKING, Any
from zoneinfo import ZoneInfo

import numpy as np

from labbook.datafiles.readers.exchange import write_exchange

if TYPE_CHECKING:
    from labbook.demo import DemoContext
    from labbook.demo.logbook import PlannedSession
    from labbook.samples.queries import SurfaceState

# Seed topics of their own (readings 1-3, samples 21, tips 31-32, logbook 41-43).
_TOPIC_PLAN = 51
_TOPIC_DATA = 52

# --- invented surfaces -------------------------------------------------------------------------


@dataclass(frozen=True)
class Substrate:
    """What the generators need to know about a crystal face. ``nn_m`` and ``step_m`` are
    within 0.01 Å of the bulk-terminated values of REFERENCES.md §6, ``onset_v`` of Cu(111)
    is the surface-state onset of §8; the rest is invented for the demo."""

    name: str
    lattice: str  # "hexagonal" or "square"
    nn_m: float  # nearest-neighbour distance
    step_m: float  # monatomic step height
    corrugation_m: float  # peak-to-peak atomic corrugation in a constant-current topograph
    onset_v: float  # centre of the dI/dV step (Cu(111): the surface-state band bottom)
    onset_width_v: float
    onset_height: float  # the step, relative to the dI/dV background at 0 V

    @property
    def row_spacing_m(self) -> float:
        """The period of the strongest FFT spots of an atomic-resolution image."""
        return self.nn_m * (math.sqrt(3.0) / 2.0 if self.lattice == "hexagonal" else 1.0)


CU111 = Substrate("Cu(111)", "hexagonal", 2.55e-10, 2.08e-10, 12e-12, -0.44, 0.008, 0.8)
# The weak, broad dI/dV step of Ag(100) at +0.33 V is invented: a feature to tell the two
# crystals' spectra apart, not a property of real Ag(100).
AG100 = Substrate("Ag(100)", "square", 2.89e-10, 2.04e-10, 8e-12, 0.33, 0.04, 0.25)
SUBSTRATES = {s.name: s for s in (CU111, AG100)}

NACL_HEIGHT_M = 3.5e-10  # apparent height of a NaCl bilayer island (invented, bias-independent)
NACL_TRILAYER_M = 1.6e-10  # what a third-layer patch adds on top (invented)
NACL_ONSET_V = -0.22  # the interface state under the bilayer, shifted up (invented)
C60_SPACING_M = 1.0e-9
C60_HEIGHT_M = 7.5e-10
C60_LEVEL_V = 0.62  # the lowest unoccupied level seen in dI/dV (invented)
NACL_ION_SPACING_M = 3.99e-10  # Cl–Cl on a NaCl(100) layer: what a CO tip resolves in Δf
# Tunnelling decay: I ∝ exp(−2κz) with κ = 1.1 Å⁻¹ (a work function of about 4.6 eV).
KAPPA_PER_M = 1.1e10
# Lock-in frequencies the demo lab uses: a few kHz, away from the mains harmonics (FIELD.md §5).
LOCKIN_FREQUENCIES_HZ = (731.0, 873.0, 1170.0, 2311.0, 3011.0)


# --- image generators ------------------------------------------------------------------------


def pixel_grid(
    pixels: tuple[int, int], size_m: tuple[float, float]
) -> tuple[np.ndarray, np.ndarray]:
    """Pixel-centre coordinates (m): ``x`` of shape (1, nx), ``y`` of shape (ny, 1), so the
    generators broadcast to (ny, nx) without building full coordinate arrays."""
    nx, ny = pixels
    x = (np.arange(nx) + 0.5) * (size_m[0] / nx)
    y = (np.arange(ny) + 0.5) * (size_m[1] / ny)
    return x[None, :], y[:, None]


def _rotated(x: np.ndarray, y: np.ndarray, angle_deg: float) -> tuple[np.ndarray, np.ndarray]:
    turn = math.radians(angle_deg)
    c, s = math.cos(turn), math.sin(turn)
    return x * c + y * s, -x * s + y * c


def hexagonal_lattice(
    x: np.ndarray,
    y: np.ndarray,
    *,
    nn_m: float,
    corrugation_m: float,
    angle_deg: float = 0.0,
    phases: tuple[float, float] = (0.0, 0.0),
) -> np.ndarray:
    """Maxima on a triangular net of nearest-neighbour distance ``nn_m``, ``corrugation_m``
    peak to peak. Three plane waves at 120° whose wave vectors (and phases) sum to zero, so
    the maxima are the net's points; their FFT spots lie at |k| = 2/(√3·a)."""
    k = 4.0 * math.pi / (math.sqrt(3.0) * nn_m)
    waves = (phases[0], phases[1], -phases[0] - phases[1])
    total = np.zeros(np.broadcast_shapes(x.shape, y.shape))
    for j, phase in enumerate(waves):
        turn = math.radians(angle_deg + 90.0 + 120.0 * j)
        total += np.cos(k * (x * math.cos(turn) + y * math.sin(turn)) + phase)
    # The sum of the three cosines runs from −1.5 (between atoms) to 3 (on an atom).
    return corrugation_m * (total + 1.5) / 4.5


def square_lattice(
    x: np.ndarray,
    y: np.ndarray,
    *,
    nn_m: float,
    corrugation_m: float,
    angle_deg: float = 0.0,
    phases: tuple[float, float] = (0.0, 0.0),
) -> np.ndarray:
    """Maxima on a square net of side ``nn_m``, ``corrugation_m`` peak to peak; FFT spots at
    |k| = 1/a."""
    u, v = _rotated(x, y, angle_deg)
    k = 2.0 * math.pi / nn_m
    total = np.cos(k * u + phases[0]) + np.cos(k * v + phases[1])
    return corrugation_m * (total + 2.0) / 4.0


def lattice(x: np.ndarray, y: np.ndarray, substrate: Substrate, rng: np.random.Generator):
    """The substrate's atomic lattice at a random orientation and registry."""
    make = hexagonal_lattice if substrate.lattice == "hexagonal" else square_lattice
    return make(
        x,
        y,
        nn_m=substrate.nn_m,
        corrugation_m=substrate.corrugation_m * rng.uniform(0.7, 1.4),
        angle_deg=rng.uniform(0.0, 60.0),
        phases=(rng.uniform(0, 2 * math.pi), rng.uniform(0, 2 * math.pi)),
    )


def terraces(
    x: np.ndarray,
    y: np.ndarray,
    *,
    step_m: float,
    width_m: float,
    angle_deg: float,
    rng: np.random.Generator,
    edge_m: float = 5e-10,
) -> np.ndarray:
    """Terraces ``width_m`` wide on average, separated by monatomic steps of ``step_m``.

    The edges meander (two sine modes along them), the widths vary (a slow, still monotonic
    modulation of the terrace index) and each edge is rounded over ``edge_m``.
    """
    u, v = _rotated(x, y, angle_deg)
    wobble = np.zeros_like(v)
    for _ in range(2):
        wavelength = width_m * rng.uniform(1.5, 4.0)
        amplitude = width_m * rng.uniform(0.05, 0.15)
        wobble = wobble + amplitude * np.sin(2 * math.pi * v / wavelength + rng.uniform(0, 6.3))
    index = (u + wobble) / width_m
    # d/du of this stays above 1 − 0.25·2π/3 > 0: the terraces never fold back.
    index = index + 0.25 * np.sin(2 * math.pi * index / 3.0 + rng.uniform(0, 6.3))
    index = index + rng.uniform(0.0, 1.0)
    level = np.floor(index)
    edge = min(0.5, edge_m / width_m)
    ramp = np.clip((index - level - (1.0 - edge)) / edge, 0.0, 1.0)
    ramp = ramp * ramp * (3.0 - 2.0 * ramp)
    direction = 1.0 if rng.random() < 0.5 else -1.0
    return direction * step_m * (level + ramp)


def tilt_and_bow(
    x: np.ndarray, y: np.ndarray, *, size_m: tuple[float, float], rng: np.random.Generator
) -> np.ndarray:
    """A sample tilt of up to ~0.6° and a bow of a few tens of pm along the slow axis (piezo
    creep after a move): what plane levelling (and line flattening) take out."""
    slope_x, slope_y = rng.normal(0.0, 0.005, 2)
    bow = rng.uniform(0.0, 30e-12)
    return slope_x * x + slope_y * y + bow * (2.0 * y / size_m[1] - 1.0) ** 2


def scan_noise(
    shape: tuple[int, int], *, white_m: float, line_m: float, rng: np.random.Generator
) -> np.ndarray:
    """White noise plus a random offset per scan line (the feedback's slow wander)."""
    ny, nx = shape
    return rng.normal(0.0, white_m, (ny, nx)) + rng.normal(0.0, line_m, (ny, 1))


def _union_fraction(
    shape: tuple[int, int],
    target: float,
    rng: np.random.Generator,
    shape_at: Any,
) -> np.ndarray:
    """A mask made of shapes added until it covers ``target`` of the image.

    ``shape_at(remaining, centre)`` returns one shape (a boolean array) at ``centre`` (a
    fraction of the frame in x and y) sized to at most the area still missing, so the union
    closes in on the target from below. Centres follow a low-discrepancy sequence from a
    random start: the islands spread over the frame, as they do on a terrace, and a plane
    fit of the image stays parallel to the substrate (which coverage by threshold needs).
    """
    mask = np.zeros(shape, dtype=bool)
    # The R2 sequence (the plastic number's powers): evenly spread points in the unit square.
    g = 1.32471795724474602596
    step = np.array([1.0 / g, 1.0 / g**2])
    point = rng.random(2)
    for _ in range(80):
        remaining = target - float(mask.mean())
        if remaining < 0.015:
            break
        point = (point + step) % 1.0
        mask |= shape_at(remaining, (float(point[0]), float(point[1])))
    return mask


def _soften(mask: np.ndarray) -> np.ndarray:
    """A 3×3 box average: island edges a pixel wide, as a finite tip draws them."""
    padded = np.pad(mask.astype(np.float64), 1, mode="edge")
    ny, nx = mask.shape
    out = np.zeros((ny, nx))
    for dy in range(3):
        for dx in range(3):
            out += padded[dy : dy + ny, dx : dx + nx]
    return out / 9.0


def nacl_islands(
    x: np.ndarray,
    y: np.ndarray,
    *,
    size_m: tuple[float, float],
    fraction: float,
    rng: np.random.Generator,
    height_m: float = NACL_HEIGHT_M,
    trilayer: bool = False,
) -> tuple[np.ndarray, float]:
    """Rectangular NaCl bilayer islands (straight non-polar edges, one orientation per image)
    covering about ``fraction`` of the image (at most 0.9); (heights, area fraction covered)."""
    angle = rng.uniform(0.0, 90.0)
    u, v = _rotated(x, y, angle)
    shape = np.broadcast_shapes(x.shape, y.shape)
    side = math.sqrt(size_m[0] * size_m[1])

    def rectangle(remaining: float, centre: tuple[float, float]) -> np.ndarray:
        edge = side * math.sqrt(remaining) * rng.uniform(0.25, 0.5)
        aspect = rng.uniform(0.6, 1.7)
        cu, cv = _rotated(
            np.float64(centre[0] * size_m[0]), np.float64(centre[1] * size_m[1]), angle
        )
        return (np.abs(u - cu) < edge * aspect / 2) & (np.abs(v - cv) < edge / aspect / 2)

    mask = _union_fraction(shape, max(0.0, min(fraction, 0.9)), rng, rectangle)
    z = _soften(mask) * height_m
    if trilayer and mask.any():
        # A small third-layer patch on one of the islands.
        rows, cols = np.nonzero(mask)
        pick = int(rng.integers(rows.size))
        half = max(2, int(min(shape) * rng.uniform(0.03, 0.08)))
        patch = np.zeros(shape, dtype=bool)
        r, c = int(rows[pick]), int(cols[pick])
        patch[max(0, r - half) : r + half, max(0, c - half) : c + half] = True
        z += _soften(patch & mask) * NACL_TRILAYER_M
    return z, float(mask.mean())


def c60_islands(
    x: np.ndarray,
    y: np.ndarray,
    *,
    size_m: tuple[float, float],
    fraction: float,
    rng: np.random.Generator,
    spacing_m: float = C60_SPACING_M,
    height_m: float = C60_HEIGHT_M,
) -> tuple[np.ndarray, float]:
    """Compact islands of C60 on a hexagonal close packing of ``spacing_m``, each molecule a
    Gaussian bump of ``height_m`` (about one in ten a little dimmer: another orientation).
    Only whole molecules: a molecule belongs to an island when its centre does.
    (heights, the area fraction of the island outlines)."""
    shape = np.broadcast_shapes(x.shape, y.shape)
    ny, nx = shape
    side = math.sqrt(size_m[0] * size_m[1])

    def disc(remaining: float, centre: tuple[float, float]) -> np.ndarray:
        radius = side * math.sqrt(remaining / math.pi) * rng.uniform(0.6, 0.95)
        cx, cy = centre[0] * size_m[0], centre[1] * size_m[1]
        return (x - cx) ** 2 + (y - cy) ** 2 < radius**2

    mask = _union_fraction(shape, max(0.0, min(fraction, 0.9)), rng, disc)
    # The packing's basis, turned to a random domain orientation.
    turn = math.radians(rng.uniform(0.0, 60.0))
    a1 = np.array([math.cos(turn), math.sin(turn)]) * spacing_m
    a2 = np.array([math.cos(turn + math.pi / 3), math.sin(turn + math.pi / 3)]) * spacing_m
    inverse = np.linalg.inv(np.column_stack([a1, a2]))
    xs = np.broadcast_to(x, shape)
    ys = np.broadcast_to(y, shape)
    p = inverse[0, 0] * xs + inverse[0, 1] * ys
    q = inverse[1, 0] * xs + inverse[1, 1] * ys
    # The nearest point of a triangular net is a corner of the rhombic cell around a point.
    best = np.full(shape, np.inf)
    best_i = np.zeros(shape, dtype=np.int64)
    best_j = np.zeros(shape, dtype=np.int64)
    for di in (0, 1):
        for dj in (0, 1):
            i = np.floor(p).astype(np.int64) + di
            j = np.floor(q).astype(np.int64) + dj
            d2 = (xs - (i * a1[0] + j * a2[0])) ** 2 + (ys - (i * a1[1] + j * a2[1])) ** 2
            closer = d2 < best
            best = np.where(closer, d2, best)
            best_i = np.where(closer, i, best_i)
            best_j = np.where(closer, j, best_j)
    centre_x = best_i * a1[0] + best_j * a2[0]
    centre_y = best_i * a1[1] + best_j * a2[1]
    col = np.floor(centre_x / (size_m[0] / nx)).astype(np.int64)
    row = np.floor(centre_y / (size_m[1] / ny)).astype(np.int64)
    inside = (col >= 0) & (col < nx) & (row >= 0) & (row < ny)
    member = np.zeros(shape, dtype=bool)
    member[inside] = mask[row[inside], col[inside]]
    # A fixed hash of the molecule's lattice indices picks the dim ones (no extra draws).
    dim = ((best_i * 7919 + best_j * 104729) % 97) < 10
    sigma = 0.26 * spacing_m
    bump = np.exp(-best / (2.0 * sigma**2)) * np.where(dim, 0.85, 1.0)
    return height_m * bump * member, float(mask.mean())


def point_adsorbates(
    shape: tuple[int, int],
    *,
    size_m: tuple[float, float],
    per_m2: float,
    depth_m: float,
    sigma_m: float,
    rng: np.random.Generator,
) -> np.ndarray:
    """Single molecules (CO on a metal, imaged with a metal tip) as Gaussian dips of
    ``depth_m``, at random sites, ``per_m2`` on average: one FFT convolution, whatever their
    number."""
    ny, nx = shape
    count = int(rng.poisson(per_m2 * size_m[0] * size_m[1]))
    if count == 0:
        return np.zeros(shape)
    deltas = np.zeros(shape)
    np.add.at(deltas, (rng.integers(0, ny, count), rng.integers(0, nx, count)), 1.0)
    dx, dy = size_m[0] / nx, size_m[1] / ny
    kx = np.fft.rfftfreq(nx, dx)[None, :]
    ky = np.fft.fftfreq(ny, dy)[:, None]
    gaussian = np.exp(-2.0 * math.pi**2 * sigma_m**2 * (kx**2 + ky**2))
    # A unit delta becomes a Gaussian of unit volume: scale its peak to the depth.
    spread = np.fft.irfft2(np.fft.rfft2(deltas) * gaussian, s=shape)
    return -depth_m * spread * (2.0 * math.pi * sigma_m**2) / (dx * dy)


def constant_height_current(
    z_m: np.ndarray, *, current_a: float, rng: np.random.Generator, noise: float = 0.01
) -> np.ndarray:
    """The tunnelling current over a surface ``z_m`` with the tip held at one height:
    I ∝ exp(2κ·z), ``current_a`` at the mean height, with ``noise`` relative to it."""
    current = current_a * np.exp(2.0 * KAPPA_PER_M * (z_m - float(np.mean(z_m))))
    return current + rng.normal(0.0, noise * current_a, z_m.shape)


def feedback_error(
    z_m: np.ndarray, *, setpoint_a: float, dx_m: float, rng: np.random.Generator
) -> np.ndarray:
    """The current of a constant-current scan: the setpoint, plus the error the feedback
    leaves where the surface slopes along the fast (x) axis, plus noise."""
    slope = np.gradient(z_m, dx_m, axis=1)
    return setpoint_a * (1.0 + 0.3 * np.tanh(slope / 0.2)) + rng.normal(
        0.0, 0.01 * setpoint_a, z_m.shape
    )


# --- spectra ---------------------------------------------------------------------------------


def didv_model(
    bias_v: np.ndarray,
    *,
    onset_v: float | None = None,
    onset_width_v: float = 0.01,
    onset_height: float = 0.0,
    peaks: Sequence[tuple[float, float, float]] = (),
    curvature: float = 0.3,
    slope: float = 0.08,
) -> np.ndarray:
    """dI/dV in units of its background at 0 V: a slowly rising background (the tunnelling
    transmission), a broadened step at ``onset_v`` (a 2-D band bottom: flat above, with a
    slight decay), and Gaussian ``peaks`` (centre, width, height)."""
    v = np.asarray(bias_v, dtype=np.float64)
    g = 1.0 + slope * v + curvature * v**2
    if onset_v is not None:
        step = 0.5 * (1.0 + np.tanh((v - onset_v) / onset_width_v))
        g = g + onset_height * step * (1.0 - 0.12 * np.clip(v - onset_v, 0.0, None))
    for centre, width, height in peaks:
        g = g + height * np.exp(-0.5 * ((v - centre) / width) ** 2)
    return g


def current_from_didv(
    bias_v: np.ndarray, didv: np.ndarray, *, setpoint_a: float, stabilisation_bias_v: float
) -> tuple[np.ndarray, np.ndarray]:
    """(I(V) in A, dI/dV in S): the integral of ``didv`` from 0 V, scaled so that the current
    at the stabilisation bias is the setpoint (in magnitude; negative at negative bias)."""
    v = np.asarray(bias_v, dtype=np.float64)
    order = np.argsort(v)
    vs, gs = v[order], np.asarray(didv, dtype=np.float64)[order]
    integral = np.concatenate([[0.0], np.cumsum(0.5 * (gs[1:] + gs[:-1]) * np.diff(vs))])
    integral -= np.interp(0.0, vs, integral)
    scale = setpoint_a / abs(float(np.interp(stabilisation_bias_v, vs, integral)))
    current = np.empty_like(v)
    current[order] = integral * scale
    return current, np.asarray(didv, dtype=np.float64) * scale


# --- what is on the stage, what is in the scanner -----------------------------------------------


@dataclass(frozen=True)
class Surface:
    """The sample at an acquisition: its face and, since its last cleaning, the nominal
    coverages (ML) and the CO exposure (L, gauge-corrected)."""

    substrate: Substrate
    nacl_ml: float = 0.0
    c60_ml: float = 0.0
    co_langmuir: float = 0.0

    @property
    def adsorbate(self) -> str:
        if max(self.nacl_ml, self.c60_ml) <= 0.0:
            return ""
        return "NaCl" if self.nacl_ml >= self.c60_ml else "C60"

    @property
    def point_defects_per_m2(self) -> float:
        """Single molecules on the bare metal: a few per 100 nm² from the residual gas, more
        after a CO dose (1 L of CO brings about 3.8 molecules per nm², Hertz–Knudsen at room
        temperature; a sticking coefficient of one is assumed)."""
        return 3e16 + self.co_langmuir * 3.8e18


@dataclass(frozen=True)
class Probe:
    """The tip in the scanner: a plain STM tip, or the tuning-fork sensor with its measured
    resonance, stiffness and quality factor."""

    force_sensor: bool = False
    resonance_hz: float | None = None
    stiffness_n_per_m: float | None = None
    quality_factor: float | None = None


@dataclass(frozen=True)
class Conditions:
    """What the instrument's own sensors read at the acquisition (from the demo readings)."""

    temperature_k: float = 4.5
    pressure_mbar: float | None = None


@dataclass(frozen=True)
class Acquisition:
    """One planned dataset of a session: when, and its own seed."""

    at: datetime
    key: tuple[int, ...]

    def rng(self) -> np.random.Generator:
        return np.random.default_rng(list(self.key))


@dataclass
class Dataset:
    """A generated dataset: arrays, units and metadata in labbook's field names (DESIGN §4),
    plus what the generator put in (``truth``) and an analysis request for ingestion."""

    kind: str
    scene: str
    channels: dict[str, np.ndarray]
    units: dict[str, str]
    metadata: dict[str, Any]
    axes: dict[str, np.ndarray] = field(default_factory=dict)
    truth: dict[str, Any] = field(default_factory=dict)
    analysis: dict[str, Any] = field(default_factory=dict)


def plan_session(
    seed: int,
    day_ordinal: int,
    *,
    start: datetime,
    end: datetime,
    busy: Sequence[tuple[datetime, datetime]] = (),
) -> list[Acquisition]:
    """One to three acquisitions (1.45 on average) between ``start`` and ``end``, in whole
    seconds, none inside a ``busy`` interval (a cryogen transfer, a dose), oldest first. The
    same arguments give the same list: it is the key that tells whether a session is done."""
    u = np.random.default_rng([seed, _TOPIC_PLAN, day_ordinal]).random(8)
    count = 1 + int(u[0] < 0.33) + int(u[1] < 0.12)
    first, last = start + timedelta(minutes=20), end - timedelta(minutes=15)
    if last <= first:
        return []
    span = (last - first).total_seconds()
    times: list[datetime] = []
    for k in range(count):
        at = first + timedelta(seconds=round(span * (k + u[2 + k]) / count))
        for since, until in sorted(busy):
            if since <= at <= until:
                at = until + timedelta(minutes=10)
        if at <= last and all(abs((at - t).total_seconds()) >= 300 for t in times):
            times.append(at.replace(microsecond=0))
    return [
        Acquisition(at, (seed, _TOPIC_DATA, day_ordinal, k)) for k, at in enumerate(sorted(times))
    ]


# --- one dataset ------------------------------------------------------------------------------


def _log_uniform(rng: np.random.Generator, low: float, high: float) -> float:
    return float(math.exp(rng.uniform(math.log(low), math.log(high))))


def _round(value: float, digits: int = 2) -> float:
    """As an operator sets it: two significant digits."""
    return float(f"{value:.{digits}g}")


def _image_metadata(
    acq: Acquisition,
    conditions: Conditions,
    *,
    size_m: tuple[float, float],
    pixels: tuple[int, int],
    bias_v: float,
    setpoint_a: float,
    channel: str,
    mode: str,
    rng: np.random.Generator,
) -> dict[str, Any]:
    metadata: dict[str, Any] = {
        "acquired_at": acq.at.isoformat(),
        "bias_v": bias_v,
        "bias_sign_convention": "sample",
        "setpoint_a": setpoint_a,
        "scan_size_m": [size_m[0], size_m[1]],
        "pixels": [pixels[0], pixels[1]],
        "angle_deg": float(rng.choice([0.0, 0.0, 15.0, 30.0, 45.0, 90.0])),
        "temperature_k": conditions.temperature_k,
        "channel_name": channel,
        "mode": mode,
        "line_time_s": _round(pixels[0] / 256 * rng.uniform(0.4, 1.2)),
    }
    if conditions.pressure_mbar is not None:
        metadata["pressure_mbar"] = conditions.pressure_mbar
    return metadata


def _image_bias(rng: np.random.Generator, low: float, high: float) -> float:
    """A bias of either sign with |V| between ``low`` and ``high``, rounded as typed."""
    sign = 1.0 if rng.random() < 0.6 else -1.0
    return sign * _round(_log_uniform(rng, low, high))


def topograph(acq: Acquisition, surface: Surface, conditions: Conditions, *, scene: str) -> Dataset:
    """A constant-current topograph of ``scene``: ``lattice`` (atomic resolution on a bare
    patch), ``terraces`` (steps, a few single molecules), ``nacl`` or ``c60`` (islands on a
    terrace, their area fraction the logged coverage)."""
    rng = acq.rng()
    sub = surface.substrate
    truth: dict[str, Any] = {"substrate": sub.name}
    analysis: dict[str, Any] = {}
    if scene == "lattice":
        n = 128 if rng.random() < 0.7 else 256
        side = _round(n / 128 * rng.uniform(4.0, 6.0) * 1e-9)
        bias, setpoint = _image_bias(rng, 0.005, 0.05), _round(_log_uniform(rng, 3e-10, 1e-9))
    elif scene == "terraces":
        n = 256 if rng.random() < 0.3 else 128
        side = _round(_log_uniform(rng, 30e-9, 150e-9))
        bias, setpoint = _image_bias(rng, 0.1, 1.0), _round(_log_uniform(rng, 1e-11, 1e-10))
    elif scene == "nacl":
        n = 256 if rng.random() < 0.3 else 128
        side = _round(_log_uniform(rng, 30e-9, 80e-9))
        bias, setpoint = _image_bias(rng, 0.3, 1.0), _round(_log_uniform(rng, 1e-11, 5e-11))
    elif scene == "c60":
        # At least six pixels per molecule.
        n = 256 if rng.random() < 0.3 else 128
        side = _round(_log_uniform(rng, 12e-9, 20e-9) * n / 128)
        bias, setpoint = _image_bias(rng, 0.5, 1.0), _round(_log_uniform(rng, 1e-11, 5e-11))
    else:
        raise ValueError(f"unknown topograph scene {scene!r}")
    size = (side, side)
    x, y = pixel_grid((n, n), size)
    z = tilt_and_bow(x, y, size_m=size, rng=rng)
    z = z + scan_noise((n, n), white_m=rng.uniform(1.5e-12, 3e-12), line_m=2e-12, rng=rng)
    if scene == "lattice":
        z = z + lattice(x, y, sub, rng)
        truth["row_spacing_m"] = sub.row_spacing_m
        truth["nn_m"] = sub.nn_m
    elif scene == "terraces":
        width = side * rng.uniform(0.2, 0.6)
        z = z + terraces(
            x, y, step_m=sub.step_m, width_m=width, angle_deg=rng.uniform(0, 180), rng=rng
        )
        z = z + point_adsorbates(
            (n, n),
            size_m=size,
            per_m2=surface.point_defects_per_m2,
            depth_m=40e-12,
            sigma_m=2.5e-10,
            rng=rng,
        )
        truth.update(step_m=sub.step_m, terrace_width_m=width)
    elif scene == "nacl":
        islands, fraction = nacl_islands(
            x, y, size_m=size, fraction=surface.nacl_ml, rng=rng, trilayer=rng.random() < 0.3
        )
        z = z + islands
        truth.update(island_fraction=fraction, island_height_m=NACL_HEIGHT_M)
        # Ask ingestion for the island coverage: everything above half the island height
        # (the terrace is flat, so "above the lowest level" is "on an island").
        analysis["coverage_threshold_m"] = NACL_HEIGHT_M / 2
    else:
        molecules, fraction = c60_islands(x, y, size_m=size, fraction=surface.c60_ml, rng=rng)
        z = z + molecules
        truth.update(island_fraction=fraction, molecule_spacing_m=C60_SPACING_M)
    metadata = _image_metadata(
        acq,
        conditions,
        size_m=size,
        pixels=(n, n),
        bias_v=bias,
        setpoint_a=setpoint,
        channel="z",
        mode="constant-current",
        rng=rng,
    )
    return Dataset(
        kind="topograph",
        scene=scene,
        channels={"z": z.astype(np.float32)},
        units={"z": "m"},
        metadata=metadata,
        truth=truth,
        analysis=analysis,
    )


def current_image(acq: Acquisition, surface: Surface, conditions: Conditions) -> Dataset:
    """A current image: constant height over the atomic lattice (small frames), or the
    feedback error of a constant-current frame across steps."""
    rng = acq.rng()
    sub = surface.substrate
    n = 128
    if rng.random() < 0.5:
        side = _round(rng.uniform(3.0, 5.0) * 1e-9)
        size = (side, side)
        x, y = pixel_grid((n, n), size)
        setpoint = _round(_log_uniform(rng, 2e-10, 1e-9))
        bias = _image_bias(rng, 0.002, 0.02)
        z = lattice(x, y, sub, rng) + scan_noise((n, n), white_m=1e-12, line_m=0.5e-12, rng=rng)
        current = constant_height_current(z, current_a=setpoint, rng=rng)
        mode, truth = "constant-height", {"row_spacing_m": sub.row_spacing_m}
    else:
        side = _round(_log_uniform(rng, 30e-9, 100e-9))
        size = (side, side)
        x, y = pixel_grid((n, n), size)
        setpoint = _round(_log_uniform(rng, 1e-11, 1e-10))
        bias = _image_bias(rng, 0.1, 1.0)
        z = terraces(
            x,
            y,
            step_m=sub.step_m,
            width_m=side * rng.uniform(0.2, 0.6),
            angle_deg=rng.uniform(0, 180),
            rng=rng,
        )
        current = feedback_error(z, setpoint_a=setpoint, dx_m=side / n, rng=rng)
        mode, truth = "constant-current", {"step_m": sub.step_m}
    metadata = _image_metadata(
        acq,
        conditions,
        size_m=size,
        pixels=(n, n),
        bias_v=bias,
        setpoint_a=setpoint,
        channel="current",
        mode=mode,
        rng=rng,
    )
    truth["substrate"] = sub.name
    return Dataset(
        kind="current",
        scene="current",
        channels={"current": current.astype(np.float32)},
        units={"current": "A"},
        metadata=metadata,
        truth=truth,
    )


def frequency_shift_image(
    acq: Acquisition, surface: Surface, conditions: Conditions, probe: Probe
) -> Dataset:
    """A constant-height Δf image with the tuning-fork sensor: the ions of a NaCl layer, the
    C60 molecules or the metal's atoms, more attractive (more negative Δf) on top."""
    rng = acq.rng()
    n = 128
    side = _round(rng.uniform(2.5, 5.0) * 1e-9)
    size = (side, side)
    x, y = pixel_grid((n, n), size)
    what = surface.adsorbate
    if what == "NaCl":
        pattern = square_lattice(
            x, y, nn_m=NACL_ION_SPACING_M, corrugation_m=1.0, angle_deg=rng.uniform(0, 90)
        )
        period = NACL_ION_SPACING_M
    elif what == "C60":
        pattern, _ = c60_islands(x, y, size_m=size, fraction=0.9, rng=rng, height_m=1.0)
        period = C60_SPACING_M * math.sqrt(3.0) / 2.0
    else:
        sub = surface.substrate
        pattern = lattice(x, y, sub, rng) / sub.corrugation_m
        period = sub.row_spacing_m
    offset_hz = -rng.uniform(2.0, 6.0)
    contrast_hz = rng.uniform(0.5, 1.5)
    df = offset_hz - contrast_hz * pattern / max(float(np.max(pattern)), 1e-12)
    df = (
        df
        + scan_noise((n, n), white_m=0.05, line_m=0.02, rng=rng)
        + tilt_and_bow(x, y, size_m=size, rng=rng) * 1e9 * 0.02
    )
    metadata = _image_metadata(
        acq,
        conditions,
        size_m=size,
        pixels=(n, n),
        bias_v=0.0,
        setpoint_a=_round(_log_uniform(rng, 5e-12, 5e-11)),
        channel="frequency_shift",
        mode="constant-height",
        rng=rng,
    )
    # The height was set at an STM setpoint, then the tip approached by the offset.
    metadata["z_offset_m"] = -_round(rng.uniform(30e-12, 150e-12))
    metadata["oscillation_amplitude_m"] = _round(rng.uniform(50e-12, 100e-12))
    metadata["oscillation_amplitude_kind"] = "peak"
    if probe.resonance_hz:
        metadata["sensor_resonance_hz"] = probe.resonance_hz
    if probe.stiffness_n_per_m:
        metadata["sensor_stiffness_n_per_m"] = probe.stiffness_n_per_m
    if probe.quality_factor:
        metadata["sensor_quality_factor"] = probe.quality_factor
    return Dataset(
        kind="other",
        scene="df",
        channels={"frequency_shift": df.astype(np.float32)},
        units={"frequency_shift": "Hz"},
        metadata=metadata,
        truth={"period_m": period, "adsorbate": what},
    )


def _spectrum_model(surface: Surface, rng: np.random.Generator) -> tuple[str, dict[str, Any]]:
    """Where the tip is put and what dI/dV looks like there: (place, didv_model arguments)."""
    sub = surface.substrate
    jitter = rng.uniform(-0.004, 0.004)  # the tip's own density of states, local strain
    bare = {
        "onset_v": sub.onset_v + jitter,
        "onset_width_v": sub.onset_width_v,
        "onset_height": sub.onset_height,
    }
    what = surface.adsorbate
    if what == "NaCl" and rng.random() < 0.5:
        return "nacl", {
            "onset_v": NACL_ONSET_V + jitter,
            "onset_width_v": 0.015,
            "onset_height": 0.6,
            "curvature": 0.5,
        }
    if what == "C60" and rng.random() < 0.6:
        return "c60", {"peaks": [(C60_LEVEL_V + jitter, 0.12, 2.0)], "curvature": 0.4}
    return "bare", bare


def point_spectrum(acq: Acquisition, surface: Surface, conditions: Conditions) -> Dataset:
    """I(V) with the lock-in dI/dV, feedback opened at the stabilisation bias and setpoint,
    swept from there across the feature of the place the tip is on."""
    rng = acq.rng()
    place, model = _spectrum_model(surface, rng)
    if place == "c60":
        low, high = -1.0, 1.0
    elif model["onset_v"] < 0:
        low, high = -0.8, 0.5
    else:
        low, high = -0.5, 0.8
    points = int(rng.choice([201, 301, 401, 501]))
    stabilisation = high if rng.random() < 0.7 else low
    # Swept away from the stabilisation bias.
    start, end = (high, low) if stabilisation == high else (low, high)
    bias = np.linspace(start, end, points)
    amplitude = _round(rng.choice([2e-3, 3e-3, 5e-3, 5e-3, 10e-3]))
    # The lock-in broadens the step (≈ its amplitude), the thermal 3.5·kT adds ~1.4 mV.
    width = math.hypot(model.get("onset_width_v", 0.0), 1.2 * amplitude, 0.0014)
    if "onset_width_v" in model:
        model = {**model, "onset_width_v": width}
    setpoint = _round(_log_uniform(rng, 5e-11, 1e-9))
    current, didv = current_from_didv(
        bias, didv_model(bias, **model), setpoint_a=setpoint, stabilisation_bias_v=stabilisation
    )
    repeats = int(rng.choice([1, 2, 4]))
    # The preamplifier's noise over a 20 ms dwell (tens of fA) and a little of the current's
    # own, averaged over the repeated sweeps.
    noise_a = (5e-14 + 5e-4 * setpoint) / math.sqrt(repeats)
    current = current + rng.normal(0.0, noise_a, points)
    lockin = didv + rng.normal(0.0, 0.01 * float(np.median(didv)) / math.sqrt(repeats), points)
    metadata: dict[str, Any] = {
        "acquired_at": acq.at.isoformat(),
        "bias_v": stabilisation,
        "bias_sign_convention": "sample",
        "setpoint_a": setpoint,
        "stabilisation_bias_v": stabilisation,
        "temperature_k": conditions.temperature_k,
        "channel_name": "current",
        "mode": "constant-height",
        "lockin_amplitude_v": amplitude,
        "lockin_amplitude_kind": "rms",
        "lockin_frequency_hz": float(rng.choice(LOCKIN_FREQUENCIES_HZ)),
        "lockin_time_constant_s": 0.01,
        "lockin_harmonic": 1,
        "sweep_start_v": start,
        "sweep_end_v": end,
        "sweep_points": points,
        "sweep_dwell_s": 0.02,
        "sweep_repeats": repeats,
        "sweep_direction": "forward",
    }
    if conditions.pressure_mbar is not None:
        metadata["pressure_mbar"] = conditions.pressure_mbar
    truth: dict[str, Any] = {"place": place, "substrate": surface.substrate.name}
    if "onset_v" in model:
        truth["onset_v"] = model["onset_v"]
    if "peaks" in model:
        truth["level_v"] = model["peaks"][0][0]
    return Dataset(
        kind="spectrum",
        scene="sts",
        channels={"current": current.astype(np.float32), "didv": lockin.astype(np.float32)},
        units={"current": "A", "didv": "S"},
        axes={"bias_v": bias},
        metadata=metadata,
        truth=truth,
    )


def spectroscopy_grid(acq: Acquisition, surface: Surface, conditions: Conditions) -> Dataset:
    """A small dI/dV grid (16×16×101) over 10 nm: across a NaCl island edge when there are
    islands (the interface state shifts up on them), else over bare metal."""
    rng = acq.rng()
    sub = surface.substrate
    n, points = 16, 101
    side = _round(rng.uniform(8e-9, 12e-9))
    size = (side, side)
    x, y = pixel_grid((n, n), size)
    if surface.adsorbate == "NaCl":
        # The island edge runs through the frame at a random angle.
        u, _ = _rotated(x - side / 2, y - side / 2, rng.uniform(0, 180))
        on_island = np.broadcast_to(u > 0, (n, n))
    else:
        on_island = np.zeros((n, n), dtype=bool)
    onset = np.where(on_island, NACL_ONSET_V, sub.onset_v) + rng.normal(0, 0.002, (n, n))
    bias = np.linspace(-0.8, 0.4, points)
    amplitude = 0.01
    width = math.hypot(sub.onset_width_v, 1.2 * amplitude)
    step = 0.5 * (1.0 + np.tanh((bias[None, None, :] - onset[:, :, None]) / width))
    g = (
        1.0
        + 0.08 * bias
        + 0.3 * bias**2
        + np.where(on_island, 0.6, sub.onset_height)[:, :, None] * step
    )
    # Every pixel stabilised at the end of the sweep (0.4 V) at the same setpoint.
    setpoint = _round(_log_uniform(rng, 5e-11, 3e-10))
    dv = bias[1] - bias[0]
    integral = np.concatenate(
        [np.zeros((n, n, 1)), np.cumsum(0.5 * (g[..., 1:] + g[..., :-1]) * dv, axis=-1)], axis=-1
    )
    zero = int(np.argmin(np.abs(bias)))
    integral -= integral[..., zero : zero + 1]
    scale = setpoint / integral[..., -1:]
    current = integral * scale + rng.normal(0.0, 1e-3 * setpoint, (n, n, points))
    didv = g * scale + rng.normal(0.0, 0.01 * float(np.median(g * scale)), (n, n, points))
    metadata = {
        "acquired_at": acq.at.isoformat(),
        "bias_v": 0.4,
        "bias_sign_convention": "sample",
        "setpoint_a": setpoint,
        "stabilisation_bias_v": 0.4,
        "scan_size_m": [side, side],
        "pixels": [n, n],
        "temperature_k": conditions.temperature_k,
        "channel_name": "current",
        "mode": "constant-height",
        "lockin_amplitude_v": amplitude,
        "lockin_amplitude_kind": "rms",
        "lockin_frequency_hz": float(rng.choice(LOCKIN_FREQUENCIES_HZ)),
        "lockin_time_constant_s": 0.005,
        "sweep_start_v": -0.8,
        "sweep_end_v": 0.4,
        "sweep_points": points,
        "sweep_dwell_s": 0.01,
    }
    return Dataset(
        kind="grid",
        scene="grid",
        channels={"current": current.astype(np.float32), "didv": didv.astype(np.float32)},
        units={"current": "A", "didv": "S"},
        axes={"bias_v": bias},
        metadata=metadata,
        truth={"substrate": sub.name, "island_fraction": float(on_island.mean())},
    )


def generate(acq: Acquisition, surface: Surface, probe: Probe, conditions: Conditions) -> Dataset:
    """What this acquisition measures, given the sample and the tip: mostly topographs (of
    the adsorbate when there is one, else terraces or the lattice), spectra, some current
    images, now and then a grid; Δf images when the force sensor is in."""
    u = np.random.default_rng([*acq.key, 0]).random(3)
    if probe.force_sensor and u[0] < 0.4:
        return frequency_shift_image(acq, surface, conditions, probe)
    if u[0] < 0.06:
        return spectroscopy_grid(acq, surface, conditions)
    if u[0] < 0.16:
        return current_image(acq, surface, conditions)
    if u[0] < 0.46:
        return point_spectrum(acq, surface, conditions)
    what = surface.adsorbate
    if what == "NaCl":
        scene = "nacl" if u[1] < 0.8 else "lattice"
    elif what == "C60":
        scene = "c60" if u[1] < 0.8 else "lattice"
    else:
        scene = "lattice" if u[1] < 0.35 else "terraces"
    return topograph(acq, surface, conditions, scene=scene)


# --- files ---------------------------------------------------------------------------------------

#: How often each format is written: mostly our exchange layout, some ``.npy`` with the
#: metadata sent beside it, now and then an HDF5 NXdata file.
FORMAT_SHARES = (("exchange", 0.72), ("npy", 0.22), ("hdf5", 0.06))
_EXTENSIONS = {"exchange": ".lbx", "npy": ".npy", "hdf5": ".h5"}


def choose_format(acq: Acquisition, dataset: Dataset) -> str:
    u = float(np.random.default_rng([*acq.key, 1]).random())
    if dataset.kind == "grid":
        return "hdf5" if u < 0.3 else "exchange"
    if dataset.kind == "other":
        return "exchange"  # a Δf image keeps its sensor parameters in the manifest
    total = 0.0
    for name, share in FORMAT_SHARES:
        total += share
        if u < total:
            return name
    return FORMAT_SHARES[-1][0]


def name_stem(at: datetime, zone: ZoneInfo) -> str:
    """The start of every file name of an acquisition: instrument, local date and time."""
    return f"ltm1_{at.astimezone(zone):%Y%m%d_%H%M%S}"


def file_name(dataset: Dataset, fmt: str, zone: ZoneInfo) -> str:
    """The name the demo lab's acquisition program gives a file: instrument, local date and
    time, what was measured (``ltm1_20250304_093112_lattice.lbx``)."""
    at = datetime.fromisoformat(dataset.metadata["acquired_at"])
    return f"{name_stem(at, zone)}_{dataset.scene}{_EXTENSIONS[fmt]}"


def _header(dataset: Dataset) -> dict[str, Any]:
    return {
        "origin": "synthetic: invented demo data made by labbook.demo.datasets",
        "scene": dataset.scene,
        "model": {k: v for k, v in dataset.truth.items() if isinstance(v, int | float | str)},
    }


def encode(dataset: Dataset, fmt: str) -> tuple[bytes, dict[str, Any]]:
    """(the file's bytes, the metadata to send with it) in ``fmt`` (``exchange``, ``npy`` or
    ``hdf5``). Only ``.npy`` needs its description sent beside it; the analysis request
    (a coverage threshold) goes with every format."""
    upload = dict(dataset.analysis)
    if fmt == "exchange":
        data = write_exchange(
            dataset.kind,
            dataset.channels,
            axes=dataset.axes,
            units=dataset.units,
            metadata=dataset.metadata,
            header=_header(dataset),
        )
    elif fmt == "npy":
        name = dataset.metadata["channel_name"]
        buffer = io.BytesIO()
        np.save(buffer, dataset.channels[name], allow_pickle=False)
        data = buffer.getvalue()
        # The sweep's start and end rebuild the (evenly spaced) bias axis of a spectrum.
        upload.update(dataset.metadata, kind=dataset.kind, unit=dataset.units[name])
    elif fmt == "hdf5":
        data = _nexus_bytes(dataset)
    else:
        raise ValueError(f"unknown format {fmt!r}")
    return data, upload


def _nexus_bytes(dataset: Dataset) -> bytes:
    """An HDF5 file in the NeXus NXdata layout: root → NXentry (start time, instrument,
    sample temperature, the acquisition parameters as attributes in labbook's field names) →
    NXdata (the signal, further channels as auxiliary signals, axes with units)."""
    import h5py

    meta = dataset.metadata
    buffer = io.BytesIO()
    with h5py.File(buffer, "w") as root:
        root.attrs["default"] = "entry"
        entry = root.create_group("entry")
        entry.attrs["NX_class"] = "NXentry"
        entry.attrs["default"] = "data"
        entry["start_time"] = meta["acquired_at"]
        entry["title"] = f"LTM-1 {dataset.scene} ({dataset.kind})"
        instrument = entry.create_group("instrument")
        instrument.attrs["NX_class"] = "NXinstrument"
        instrument["name"] = "LTM-1"
        sample = entry.create_group("sample")
        sample.attrs["NX_class"] = "NXsample"
        sample["temperature"] = meta["temperature_k"]
        sample["temperature"].attrs["units"] = "K"
        parameters = entry.create_group("acquisition")
        parameters.attrs["NX_class"] = "NXcollection"
        skip = {"acquired_at", "temperature_k", "pixels", "sweep_points"}
        for key, value in meta.items():
            if key not in skip:
                parameters.attrs[key] = np.asarray(value) if isinstance(value, list) else value
        parameters.attrs["synthetic"] = _header(dataset)["origin"]
        data = entry.create_group("data")
        data.attrs["NX_class"] = "NXdata"
        names = list(dataset.channels)
        data.attrs["signal"] = names[0]
        if len(names) > 1:
            data.attrs["auxiliary_signals"] = names[1:]
        for name, array in dataset.channels.items():
            kwargs = {}
            if array.ndim >= 2:
                kwargs = {"compression": "gzip", "chunks": True}
            stored = data.create_dataset(name, data=array, **kwargs)
            stored.attrs["units"] = dataset.units[name]
        first = dataset.channels[names[0]]
        axes: list[str] = []
        if first.ndim >= 2:
            ny, nx = first.shape[:2]
            size = meta["scan_size_m"]
            data["x"] = (np.arange(nx) + 0.5) * size[0] / nx
            data["y"] = (np.arange(ny) + 0.5) * size[1] / ny
            data["x"].attrs["units"] = "m"
            data["y"].attrs["units"] = "m"
            data.attrs["y_indices"] = 0
            data.attrs["x_indices"] = 1
            axes = ["y", "x"]
        if "bias_v" in dataset.axes:
            data["bias"] = dataset.axes["bias_v"]
            data["bias"].attrs["units"] = "V"
            data.attrs["bias_indices"] = first.ndim - 1
            axes.append("bias")
        data.attrs["axes"] = axes
    return buffer.getvalue()


# --- the demo step ---------------------------------------------------------------------------

#: Where the demo lab's acquisition PC puts its files (invented), as the ingest records it.
DATA_SHARE = "/data/LTM-1"


def _surface(sample: Any, state: SurfaceState | None) -> Surface:
    substrate = SUBSTRATES.get(sample.substrate, CU111)
    if state is None:
        return Surface(substrate)
    coverage = {c.material: c.coverage_ml for c in state.coverages}
    return Surface(
        substrate,
        nacl_ml=coverage.get("NaCl", 0.0),
        c60_ml=coverage.get("C60", 0.0),
        co_langmuir=state.exposures_langmuir.get("CO", 0.0),
    )


def _probe(tip: Any) -> Probe:
    if tip is None or not tip.sensor_kind:
        return Probe()
    return Probe(
        force_sensor=True,
        resonance_hz=tip.resonance_frequency_hz,
        stiffness_n_per_m=tip.stiffness_n_per_m,
        quality_factor=tip.quality_factor,
    )


def _state_at(states: Sequence[tuple[datetime, SurfaceState]], at: datetime):
    found = None
    for started, state in states:
        if started > at:
            break
        found = state
    return found


def _busy_windows(session: PlannedSession, transfers) -> list:
    """When nobody acquires: a cryogen transfer (the bath bubbles, the tip drifts) and the
    half hour after it, and a CO dose with the pick-up that follows it."""
    windows = [
        (start - timedelta(minutes=5), end + timedelta(minutes=20))
        for start, end in transfers
        if end >= session.start and start <= session.end
    ]
    for dose in session.doses:
        windows.append(
            (
                dose.started_at - timedelta(minutes=10),
                (dose.ended_at or dose.started_at) + timedelta(minutes=40),
            )
        )
    return windows


def load_datasets(ctx: DemoContext) -> dict[str, int]:
    """One to three datasets in every measuring session of the demo window, ingested as the
    session's operator on LTM-1; sessions whose datasets are all there already are skipped."""
    # Django and the other demo steps are imported here: the generators above stay usable
    # without a configured project.
    import logging

    from django.db import transaction

    from labbook.datafiles import actions
    from labbook.datafiles.models import AcquiredFile
    from labbook.demo.load import scenario_for
    from labbook.demo.logbook import planned_sessions
    from labbook.demo.readings import series
    from labbook.instruments.models import InstrumentEvent
    from labbook.samples import queries as sample_queries
    from labbook.tips import queries as tip_queries

    scenario = ctx.scenario or scenario_for(ctx.instrument, ctx.now)
    zone = ZoneInfo(scenario.time_zone)
    ltm = ctx.instrument
    transfers = [
        (event.start, event.end or event.start)
        for event in InstrumentEvent.objects.filter(
            instrument=ltm,
            kind=InstrumentEvent.Kind.CRYOGEN_TRANSFER,
            start__gte=ctx.start - timedelta(days=1),
            start__lte=ctx.now,
        )
    ]
    ours = AcquiredFile.objects.filter(instrument=ltm, original_name__startswith="ltm1_")
    # A dataset is there when a file of the instrument has its acquisition time, or (not
    # processed yet, with a worker behind a broker) a pending file has its name.
    have = set(
        ours.filter(acquired_at__gte=ctx.start - timedelta(days=1)).values_list(
            "acquired_at", flat=True
        )
    )
    waiting = {
        name[: len("ltm1_YYYYmmdd_HHMMSS")]
        for name in ours.filter(status=AcquiredFile.Status.PENDING).values_list(
            "original_name", flat=True
        )
    }
    todo: list[tuple[PlannedSession, list[Acquisition]]] = []
    for session in planned_sessions(ctx, scenario):
        planned = plan_session(
            scenario.seed,
            session.day.toordinal(),
            start=session.measure_from,
            end=session.end,
            busy=_busy_windows(session, transfers),
        )
        missing = [a for a in planned if a.at not in have and name_stem(a.at, zone) not in waiting]
        if missing:
            todo.append((session, missing))

    created = 0
    if todo:
        samples = {session.sample.pk: session.sample for session, _ in todo}
        states = {}
        for pk, sample in samples.items():
            preparations = list(sample_queries.preparations_of(sample))
            after = sample_queries.surface_states_after(sample, preparations)
            states[pk] = [(p.started_at, after[p.pk]) for p in preparations]
        mounts = list(tip_queries.mounts_on(ltm).select_related("tip").order_by("start"))
        # What the head thermometer and the microscope gauge read then, from the readings'
        # own story (the same numbers the logged channels hold).
        instants = np.array([int(a.at.timestamp()) for _, acqs in todo for a in acqs])
        kelvin = iter(series(scenario, "head_temperature", instants))
        mbar = iter(series(scenario, "microscope_pressure", instants))
        # An eager task logs a line per file at INFO: hundreds of lines in the demo's output,
        # which reports the totals instead. Warnings and errors still show.
        trace = logging.getLogger("celery.app.trace")
        level = trace.level
        trace.setLevel(max(level, logging.WARNING))
        try:
            for session, acquisitions in todo:
                # One transaction a session: its files are processed when it commits.
                with transaction.atomic():
                    for acq in acquisitions:
                        conditions = Conditions(
                            temperature_k=round(float(next(kelvin)), 2),
                            pressure_mbar=_round(float(next(mbar))),
                        )
                        state = _state_at(states[session.sample.pk], acq.at)
                        mount = next((m for m in mounts if m.covers(acq.at)), None)
                        dataset = generate(
                            acq,
                            _surface(session.sample, state),
                            _probe(None if mount is None else mount.tip),
                            conditions,
                        )
                        fmt = choose_format(acq, dataset)
                        data, upload = encode(dataset, fmt)
                        name = file_name(dataset, fmt, zone)
                        result = actions.ingest(
                            io.BytesIO(data),
                            name,
                            metadata=upload,
                            actor=session.operator,
                            source="ingest",
                            source_path=f"{DATA_SHARE}/{acq.at.astimezone(zone):%Y-%m-%d}/{name}",
                            instrument=ltm,
                        )
                        created += int(result.created)
        finally:
            trace.setLevel(level)

    rows = list(ours.values_list("kind", "original_name", "status"))
    kinds = Counter(kind for kind, _, _ in rows)
    formats = Counter(name.rsplit(".", 1)[-1] for _, name, _ in rows)
    statuses = Counter(status for _, _, status in rows)
    ctx.report(
        f"datasets: {len(rows)} on {ltm.name} ({created} new; "
        + ", ".join(f"{n} {kind}" for kind, n in sorted(kinds.items()))
        + "; "
        + ", ".join(f"{n} .{ext}" for ext, n in sorted(formats.items()))
        + "; "
        + ", ".join(f"{n} {status}" for status, n in sorted(statuses.items()))
        + ")"
    )
    return {"datasets": len(rows)}
