"""Synthetic imaging-mass-cytometry-like demo cohort with known ground truth.

This module is an independent ground truth for plexwash: it uses only numpy,
tifffile and the standard library, never plexwash itself. Importing it has no
side effects; running it as a script regenerates the committed files in the
folder that holds it::

    python example_stack/generate.py

The tissue is invented (see ``README.md`` beside this file): round-cell
nodules with a rim zone, spindle-cell stroma between them, empty lumen holes.

Measurement model, per pixel and channel ``j``::

    y_j = Poisson(r * sum_i S[i, j] * x_i) + Poisson(r * b_j) + hot_j

``x`` is the true expected stain signal (counts per pixel), ``S`` the
spillover matrix (entry (i, j) = fraction of channel i's signal measured in
channel j, diagonal 1), ``b_j`` the channel's background speckle rate, ``r``
a per-row factor (1, or far below 1 on line drop-out rows) and ``hot_j`` the
hot-pixel spikes. The three parts are drawn separately so each is known.
"""

import csv
import io
import json
import re
import uuid
import zipfile
from dataclasses import asdict, dataclass, replace
from pathlib import Path

import numpy as np
import tifffile

DEFAULT_RANDOM_STATE = 2026

#: spillover fraction ranges by kind of pair (common practice, from memory)
NEIGHBOUR_RANGE = (0.003, 0.008)   # mass M -> M +/- 1, different element
IMPURITY_RANGE = (0.01, 0.04)      # same element, mass within 2
OXIDE_RANGE = (0.01, 0.03)         # mass M -> M + 16
IMPURITY_MAX_MASS_GAP = 2
OXIDE_MASS_SHIFT = 16

BACKGROUND_RANGE = (0.02, 0.3)     # background speckle counts per pixel
HOT_RATE_RANGE = (1e-4, 5e-4)      # hot pixels per pixel and channel
HOT_VALUE_RANGE = (150.0, 900.0)   # counts added by one hot pixel
STRIPE_FACTOR_RANGE = (0.05, 0.2)  # intensity left on a line drop-out row
CONTROL_LEVEL = 150.0              # counts per pixel in a control's stained spots

CELL_TYPES = ("core", "rim", "stromal", "granular", "rare")
#: codes of the ``compartment`` map
OUTSIDE, NUCLEUS, CYTOPLASM, MEMBRANE = 0, 1, 2, 3
ROLES = ("stain", "dim", "rare", "specks", "failed", "dna")
COMPARTMENTS = ("membrane", "cytoplasm", "nucleus", "granule")
DNA_CHANNELS = ("Ir191", "Ir193")

_NAME_PATTERN = re.compile(r"^([A-Z][a-z]?)(\d{2,3})$")
_MEMBRANE_INNER_FRACTION = 0.25  # membrane marker level inside the cell body
_CELL_SPREAD = 0.3               # sigma of log per-cell expression


@dataclass(frozen=True)
class Marker:
    """One stain sheet channel and what its stain truly does in the tissue.

    ``level`` is the mean expected counts per pixel in a positive
    compartment; for a ``failed`` stain it is the level it should have had
    (its true signal is zero). ``fraction`` is the share of cells of
    ``cell_types`` that carry the marker.
    """

    channel: str
    label: str
    role: str
    compartment: str
    level: float
    cell_types: tuple[str, ...]
    fraction: float = 1.0


def default_stains() -> list[Marker]:
    """Return the 22-channel stains of the committed demo cohort."""
    every = CELL_TYPES
    rows = [
        ("Pr141", "membrane-A", "stain", "membrane", 60, ("core", "rim"), 0.9),
        ("Nd142", "nuclear-B", "stain", "nucleus", 40, ("core",), 0.8),
        ("Nd143", "cytoplasm-C", "stain", "cytoplasm", 100, ("core", "rim", "granular"), 0.9),
        ("Nd144", "membrane-D", "stain", "membrane", 50, ("rim",), 0.85),
        ("Nd146", "cytoplasm-E", "stain", "cytoplasm", 30, ("stromal",), 0.8),
        ("Sm147", "membrane-F", "stain", "membrane", 40, ("stromal", "granular"), 0.8),
        ("Nd148", "membrane-G", "stain", "membrane", 80, ("core",), 0.7),
        ("Sm149", "nuclear-H", "stain", "nucleus", 25, ("rim", "stromal"), 0.7),
        ("Nd150", "cytoplasm-J", "stain", "cytoplasm", 60, ("granular",), 0.9),
        ("Eu151", "membrane-K", "stain", "membrane", 50, ("rim", "granular"), 0.8),
        ("Sm152", "cytoplasm-L", "stain", "cytoplasm", 120, ("core", "stromal"), 0.85),
        ("Eu153", "cytoplasm-M", "dim", "cytoplasm", 2, ("rim",), 0.9),
        ("Gd155", "granule-N", "specks", "granule", 40, ("granular",), 1.0),
        ("Gd156", "membrane-P", "stain", "membrane", 40, ("stromal",), 0.8),
        ("Gd158", "cytoplasm-Q", "stain", "cytoplasm", 70, ("rim", "stromal"), 0.6),
        ("Tb159", "membrane-R", "failed", "membrane", 50, ("core",), 0.9),
        ("Gd160", "nuclear-S", "stain", "nucleus", 30, ("stromal", "granular"), 0.8),
        ("Dy162", "cytoplasm-T", "rare", "cytoplasm", 60, ("rare",), 1.0),
        ("Dy164", "membrane-U", "stain", "membrane", 35, ("core", "granular"), 0.7),
        ("Er166", "cytoplasm-V", "stain", "cytoplasm", 45, ("core", "rim"), 0.5),
        # natural-abundance iridium intercalator: 37.3 % Ir191, 62.7 % Ir193
        ("Ir191", "DNA-1", "dna", "nucleus", 25, every, 1.0),
        ("Ir193", "DNA-2", "dna", "nucleus", 42, every, 1.0),
    ]
    return [Marker(c, lab, role, comp, float(lv), types, frac)
            for c, lab, role, comp, lv, types, frac in rows]


def random_stains(channel_names, rng, *, failed=None, dim=None, rare=None, specks=None,
                 dna=DNA_CHANNELS) -> list[Marker]:
    """Invent a stain sheet for arbitrary channel names (for unseen test variants).

    Channels named in ``dna`` become nuclear DNA channels; ``failed``,
    ``dim``, ``rare`` and ``specks`` (a channel name or None) get those roles;
    every other channel is an ordinary stain with a random compartment,
    level (20-120 counts/pixel) and carrier cell types.

    Example
    -------
    >>> rng = np.random.default_rng(0)
    >>> stains = random_stains(["Nd142", "Nd143", "Ir191"], rng, failed="Nd143")
    >>> [m.role for m in stains]
    ['stain', 'failed', 'dna']
    """
    ordinary = ("core", "rim", "stromal", "granular")
    stains = []
    for k, name in enumerate(channel_names):
        letter = chr(ord("A") + k % 26)
        if name in dna:
            stains.append(Marker(name, f"DNA-{letter}", "dna", "nucleus", 30.0, CELL_TYPES))
            continue
        compartment = str(rng.choice(("membrane", "cytoplasm", "nucleus")))
        level = float(np.round(np.exp(rng.uniform(np.log(20), np.log(120)))))
        n_types = int(rng.integers(1, 4))
        types = tuple(str(t) for t in rng.choice(ordinary, size=n_types, replace=False))
        fraction = float(np.round(rng.uniform(0.5, 1.0), 2))
        role = "stain"
        if name == dim:
            role, compartment, level = "dim", "cytoplasm", 2.0
        elif name == rare:
            role, compartment, level, types, fraction = "rare", "cytoplasm", 60.0, ("rare",), 1.0
        elif name == specks:
            role, compartment, level, types, fraction = "specks", "granule", 40.0, ("granular",), 1.0
        elif name == failed:
            role = "failed"
        stains.append(Marker(name, f"{compartment}-{letter}", role, compartment, level,
                            types, fraction))
    return stains


def set_failed(stains, channel) -> list[Marker]:
    """Return a copy of ``stains`` whose only failed stain is ``channel``.

    Example
    -------
    >>> stains = set_failed(default_stains(), "Nd144")
    >>> [m.channel for m in stains if m.role == "failed"]
    ['Nd144']
    """
    names = [m.channel for m in stains]
    if channel not in names:
        raise KeyError(f"{channel}: not in the stain sheet")
    out = []
    for m in stains:
        if m.channel == channel:
            m = replace(m, role="failed")
        elif m.role == "failed":
            m = replace(m, role="stain")
        out.append(m)
    return out


def parse_channel(name):
    """Split a mass-tagged channel name into (element, mass), or None.

    Example
    -------
    >>> parse_channel("Nd145"), parse_channel("DNA")
    (('Nd', 145), None)
    """
    match = _NAME_PATTERN.match(name)
    if match is None:
        return None
    return match.group(1), int(match.group(2))


def spillover_kinds(channel_names, *, exclude=DNA_CHANNELS) -> dict:
    """Physically plausible spillover pairs among ``channel_names``.

    Returns ``{(i, j): kind}`` with kind ``"impurity"`` (same element, masses
    within 2), ``"oxide"`` (mass of j = mass of i + 16) or ``"neighbour"``
    (masses differ by 1, different elements); a pair that is both impurity
    and neighbour counts as impurity. Channels in ``exclude`` (by default the
    iridium DNA channels, whose two isotopes both carry real signal) take part
    in no pair.

    Example
    -------
    >>> spillover_kinds(["Nd142", "Nd143", "Gd158"])
    {(0, 1): 'impurity', (0, 2): 'oxide', (1, 0): 'impurity'}
    """
    parsed = [None if n in exclude else parse_channel(n) for n in channel_names]
    kinds = {}
    for i, src in enumerate(parsed):
        for j, dst in enumerate(parsed):
            if i == j or src is None or dst is None:
                continue
            gap = dst[1] - src[1]
            if src[0] == dst[0] and 0 < abs(gap) <= IMPURITY_MAX_MASS_GAP:
                kinds[(i, j)] = "impurity"
            elif gap == OXIDE_MASS_SHIFT:
                kinds[(i, j)] = "oxide"
            elif abs(gap) == 1:
                kinds[(i, j)] = "neighbour"
    return kinds


def build_spillover(channel_names, rng, *, exclude=DNA_CHANNELS) -> np.ndarray:
    """Draw a true spillover matrix for ``channel_names``.

    Entry (i, j) is the fraction of channel i's signal measured in channel j;
    the diagonal is 1 and only the pairs of :func:`spillover_kinds` are
    non-zero, drawn uniformly from ``NEIGHBOUR_RANGE``, ``IMPURITY_RANGE`` or
    ``OXIDE_RANGE`` and rounded to 4 decimals.

    Example
    -------
    >>> s = build_spillover(["Nd142", "Nd143"], np.random.default_rng(0))
    >>> bool(s[0, 0] == 1.0 and 0.01 <= s[0, 1] <= 0.04)
    True
    """
    ranges = {"neighbour": NEIGHBOUR_RANGE, "impurity": IMPURITY_RANGE, "oxide": OXIDE_RANGE}
    s = np.eye(len(channel_names))
    for (i, j), kind in sorted(spillover_kinds(channel_names, exclude=exclude).items()):
        s[i, j] = round(float(rng.uniform(*ranges[kind])), 4)
    return s


def draw_background_rates(n_channels, rng) -> np.ndarray:
    """Per-channel background speckle rates, log-uniform in ``BACKGROUND_RANGE``."""
    low, high = np.log(BACKGROUND_RANGE)
    return np.round(np.exp(rng.uniform(low, high, n_channels)), 4)


# ---------------------------------------------------------------- tissue

def _paint_cells(shape, centres, semi_a, semi_b, angles):
    """Label ellipses; a pixel goes to the cell whose scaled distance is least.

    Returns the label image (0 = outside, cell k has label k + 1) and each
    pixel's scaled distance to its own cell's centre (inf outside).
    """
    height, width = shape
    labels = np.zeros(shape, np.int32)
    best = np.full(shape, np.inf)
    for k, ((cy, cx), a, b, angle) in enumerate(zip(centres, semi_a, semi_b, angles, strict=True)):
        reach = int(np.ceil(max(a, b))) + 1
        y0, y1 = max(0, int(cy) - reach), min(height, int(cy) + reach + 2)
        x0, x1 = max(0, int(cx) - reach), min(width, int(cx) + reach + 2)
        if y0 >= y1 or x0 >= x1:
            continue
        dy, dx = np.mgrid[y0:y1, x0:x1].astype(float)
        dy -= cy
        dx -= cx
        u = dx * np.cos(angle) + dy * np.sin(angle)
        v = -dx * np.sin(angle) + dy * np.cos(angle)
        dist = np.sqrt((u / a) ** 2 + (v / b) ** 2)
        window = best[y0:y1, x0:x1]
        take = (dist < 1.0) & (dist < window)
        window[take] = dist[take]
        labels[y0:y1, x0:x1][take] = k + 1
    return labels, best


def _boundary(labels):
    """Pixels of a cell with a 4-neighbour of another label (or outside)."""
    edge = np.zeros(labels.shape, bool)
    padded = np.pad(labels, 1, mode="edge")
    core = padded[1:-1, 1:-1]
    for shifted in (padded[:-2, 1:-1], padded[2:, 1:-1], padded[1:-1, :-2], padded[1:-1, 2:]):
        edge |= shifted != core
    return edge & (labels > 0)


def _place_centres(rng, density, spacing):
    """Dart throwing: accept candidates with probability ``density`` and at
    least ``spacing`` (per-pixel minimum distance map) from accepted ones."""
    height, width = density.shape
    n_candidates = height * width // 12
    ys = rng.uniform(0, height, n_candidates)
    xs = rng.uniform(0, width, n_candidates)
    keep_draw = rng.uniform(0, 1, n_candidates)
    cell = float(spacing.max())
    grid: dict = {}
    accepted = []
    for y, x, p in zip(ys, xs, keep_draw, strict=True):
        iy, ix = int(y), int(x)
        if p >= density[iy, ix]:
            continue
        gap = spacing[iy, ix]
        gy, gx = int(y // cell), int(x // cell)
        clash = False
        for ny in (gy - 1, gy, gy + 1):
            for nx in (gx - 1, gx, gx + 1):
                for oy, ox, ogap in grid.get((ny, nx), ()):
                    if (oy - y) ** 2 + (ox - x) ** 2 < min(gap, ogap) ** 2:
                        clash = True
                        break
                if clash:
                    break
            if clash:
                break
        if not clash:
            grid.setdefault((gy, gx), []).append((y, x, gap))
            accepted.append((y, x))
    return np.array(accepted, float).reshape(-1, 2)


def simulate_tissue(rng, shape) -> dict:
    """Invent one tissue field: nodules (core + rim), stroma and lumen holes.

    Returns a dict with ``cells`` (int32 labels, 0 = no cell), ``cell_type``
    (int codes into ``CELL_TYPES``, index = label, entry 0 unused),
    ``compartment`` (uint8: 0 outside, 1 nucleus, 2 cytoplasm, 3 membrane),
    ``region`` (uint8: 0 lumen, 1 stroma, 2 nodule core, 3 nodule rim) and
    ``centres`` (float (n, 2) y, x).
    """
    height, width = shape
    yy, xx = np.mgrid[0:height, 0:width].astype(float)
    region = np.ones(shape, np.uint8)
    n_nodules = int(rng.integers(2, 5))
    for _ in range(n_nodules):
        cy, cx = rng.uniform(0.15, 0.85) * height, rng.uniform(0.15, 0.85) * width
        radius = rng.uniform(0.12, 0.22) * min(height, width) + 20
        r = np.hypot(yy - cy, xx - cx) / radius
        region[(r < 1.0) & (region != 2)] = 3
        region[r < 0.7] = 2
    for _ in range(int(rng.integers(1, 3))):
        cy, cx = rng.uniform(0, height), rng.uniform(0, width)
        radius = rng.uniform(15, 35)
        region[(np.hypot(yy - cy, xx - cx) < radius) & (region == 1)] = 0
    density = np.choose(region, [0.0, 0.35, 1.0, 1.0])
    spacing = np.choose(region, [14.0, 14.0, 9.5, 9.5])
    centres = _place_centres(rng, density, spacing)
    n = len(centres)
    where = region[centres[:, 0].astype(int), centres[:, 1].astype(int)]
    mix = {1: [0.0, 0.0, 0.75, 0.25], 2: [0.85, 0.05, 0.0, 0.1], 3: [0.15, 0.75, 0.0, 0.1]}
    types = np.array([rng.choice(4, p=mix[int(w)]) for w in where], int)
    n_rare = min(n, int(rng.integers(4, 9)))
    types[rng.choice(n, size=n_rare, replace=False)] = CELL_TYPES.index("rare")
    stromal = types == CELL_TYPES.index("stromal")
    semi_a = np.where(stromal, rng.uniform(8.0, 11.0, n), rng.uniform(5.0, 7.5, n))
    semi_b = np.where(stromal, rng.uniform(3.0, 4.5, n), semi_a * rng.uniform(0.75, 1.0, n))
    main_angle = rng.uniform(0, np.pi)
    angles = np.where(stromal, main_angle + rng.normal(0, 0.35, n), rng.uniform(0, np.pi, n))
    cells, scaled = _paint_cells(shape, centres, semi_a, semi_b, angles)
    nucleus_fraction = np.concatenate([[0.0], rng.uniform(0.45, 0.6, n)])
    compartment = np.zeros(shape, np.uint8)
    inside = cells > 0
    compartment[inside] = CYTOPLASM
    compartment[inside & (scaled < nucleus_fraction[cells])] = NUCLEUS
    compartment[_boundary(cells)] = MEMBRANE
    return {
        "cells": cells,
        "cell_type": np.concatenate([[0], types]).astype(np.uint8),
        "compartment": compartment,
        "region": region,
        "centres": centres,
    }


def _grow_specks(rng, tissue):
    """Tiny granules: 1-3 per granular cell, 2-6 pixels each, 4-connected,
    in the cell body, never touching another granule. Returns uint16 labels."""
    cells, compartment = tissue["cells"], tissue["compartment"]
    specks = np.zeros(cells.shape, np.uint16)
    height, width = cells.shape
    granular = np.flatnonzero(tissue["cell_type"] == CELL_TYPES.index("granular"))
    granular = granular[granular > 0]
    steps = ((-1, 0), (1, 0), (0, -1), (0, 1))
    count = 0
    for label in granular:
        body = np.argwhere((cells == label) & (compartment != NUCLEUS))
        if len(body) == 0:
            continue
        for _ in range(int(rng.integers(1, 4))):
            target = int(rng.integers(2, 7))
            start = tuple(body[rng.integers(len(body))])
            count += 1

            def free(y, x, own=count):
                if not (0 <= y < height and 0 <= x < width) or specks[y, x]:
                    return False
                around = specks[max(0, y - 1):y + 2, max(0, x - 1):x + 2]
                return not np.any((around != 0) & (around != own))

            if not free(*start):
                count -= 1
                continue
            pixels = [start]
            specks[start] = count
            for _attempt in range(40):
                if len(pixels) >= target:
                    break
                y, x = pixels[rng.integers(len(pixels))]
                dy, dx = steps[rng.integers(4)]
                if free(y + dy, x + dx):
                    pixels.append((y + dy, x + dx))
                    specks[y + dy, x + dx] = count
            if len(pixels) < 2:
                specks[start] = 0
                count -= 1
    return specks


def true_signal(rng, stains, tissue, specks) -> np.ndarray:
    """True expected stain signal x, shape (C, Y, X), float64 values exactly
    representable in float16 (so a float16 copy of the truth is lossless).
    A ``failed`` stain is zero everywhere."""
    cells, compartment, cell_type = tissue["cells"], tissue["compartment"], tissue["cell_type"]
    n_cells = len(cell_type) - 1
    dna_content = np.exp(rng.normal(0, 0.2, n_cells + 1))
    x = np.zeros((len(stains),) + cells.shape)
    for c, marker in enumerate(stains):
        if marker.role == "failed":
            continue
        if marker.compartment == "granule":
            n_specks = int(specks.max())
            speck_level = marker.level * np.exp(rng.normal(0, 0.25, n_specks + 1))
            speck_level[0] = 0.0
            x[c] = speck_level[specks]
            continue
        carriers = np.isin(cell_type, [CELL_TYPES.index(t) for t in marker.cell_types])
        carriers &= rng.uniform(0, 1, n_cells + 1) < marker.fraction
        carriers[0] = False
        if marker.role == "dna":
            per_cell = marker.level * dna_content
        else:
            per_cell = marker.level * np.exp(rng.normal(0, _CELL_SPREAD, n_cells + 1))
        per_cell = np.where(carriers, per_cell, 0.0)
        value = per_cell[cells]
        if marker.compartment == "nucleus":
            weight = compartment == NUCLEUS
        elif marker.compartment == "cytoplasm":
            weight = (compartment == CYTOPLASM) | (compartment == MEMBRANE)
        else:
            weight = np.choose(compartment, [0.0, 0.0, _MEMBRANE_INNER_FRACTION, 1.0])
        x[c] = value * weight
    return x.astype(np.float16).astype(np.float64)


# ---------------------------------------------------------------- acquisition

def _stripe_rows(rng, height, n_rows):
    rows = []
    while len(rows) < n_rows:
        r = int(rng.integers(8, height - 8))
        if all(abs(r - o) >= 4 for o in rows):
            rows.append(r)
    return np.array(sorted(rows), int)


def _acquire(rng, mean, background_rate, row_factor, *, n_persistent_hot):
    """Draw signal counts, background speckle and hot pixels separately."""
    n_channels, height, width = mean.shape
    scale = row_factor[None, :, None]
    signal = rng.poisson(mean * scale)
    background = rng.poisson(background_rate[:, None, None] * scale * np.ones(mean.shape))
    hot = []
    rates = rng.uniform(*HOT_RATE_RANGE, n_channels)
    for c in range(n_channels):
        k = rng.binomial(height * width, rates[c])
        flat = rng.choice(height * width, size=k, replace=False)
        for f in flat:
            hot.append((c, f // width, f % width, 0))
    persistent = np.column_stack([rng.integers(0, height, n_persistent_hot),
                                  rng.integers(0, width, n_persistent_hot)])
    for y, x in persistent:
        for c in range(n_channels):
            hot.append((c, y, x, 1))
    hot = np.array(hot, np.int32).reshape(-1, 4)
    low, high = np.log(HOT_VALUE_RANGE)
    values = np.round(np.exp(rng.uniform(low, high, len(hot)))).astype(np.int32)
    counts = signal + background
    np.add.at(counts, (hot[:, 0], hot[:, 1], hot[:, 2]), values)
    hot_table = np.column_stack([hot[:, :3], values, hot[:, 3]]).astype(np.int32)
    return counts, background, hot_table, rates


def _as_shape(size):
    if np.ndim(size) == 0:
        return int(size), int(size)
    return int(size[0]), int(size[1])


def simulate_roi(rng, stains, spillover, size, *, background_rate=None, n_striped_rows=0,
                 n_persistent_hot=2, dtype=np.uint16):
    """Simulate one ROI's measured counts and return them with their truth.

    Parameters
    ----------
    rng : numpy.random.Generator
    stains : list of Marker
    spillover : (C, C) array, entry (i, j) = fraction of i measured in j
    size : int or (height, width)
    background_rate : (C,) array, optional
        Background speckle counts per pixel; drawn when None.
    n_striped_rows : int
        Number of line drop-out rows (intensity factor 0.05-0.2, all channels).
    n_persistent_hot : int
        Hot pixels at the same spot in every channel.
    dtype : numpy dtype of the returned counts.

    Returns
    -------
    counts : (C, Y, X) array of ``dtype``
    truth : dict with ``channels``, ``signal`` (true x), ``mean`` (S^T x),
        ``background`` (speckle counts drawn), ``background_rate``,
        ``hot_pixels`` (int32 rows: channel, y, x, added counts, persistent
        0/1), ``hot_rate``, ``row_factor``, ``striped_rows``, ``specks``
        (granule labels), ``specks_channel``, ``failed``, plus the tissue
        maps of :func:`simulate_tissue`.

    Example
    -------
    >>> stains = random_stains(["Nd142", "Nd143", "Ir191"], np.random.default_rng(1))
    >>> s = build_spillover([m.channel for m in stains], np.random.default_rng(2))
    >>> counts, truth = simulate_roi(np.random.default_rng(3), stains, s, (64, 80))
    >>> counts.shape, truth["signal"].shape
    ((3, 64, 80), (3, 64, 80))
    """
    shape = _as_shape(size)
    names = [m.channel for m in stains]
    spillover = np.asarray(spillover, float)
    if spillover.shape != (len(stains), len(stains)):
        raise ValueError("spillover must be C x C for the stain sheet's C channels")
    if background_rate is None:
        background_rate = draw_background_rates(len(stains), rng)
    background_rate = np.asarray(background_rate, float)
    tissue = simulate_tissue(rng, shape)
    specks = _grow_specks(rng, tissue)
    x = true_signal(rng, stains, tissue, specks)
    mean = np.tensordot(spillover, x, axes=(0, 0))  # y_j = sum_i S[i, j] x_i
    striped = _stripe_rows(rng, shape[0], n_striped_rows)
    row_factor = np.ones(shape[0])
    row_factor[striped] = np.round(rng.uniform(*STRIPE_FACTOR_RANGE, len(striped)), 3)
    counts, background, hot, hot_rate = _acquire(rng, mean, background_rate, row_factor,
                                                 n_persistent_hot=n_persistent_hot)
    truth = dict(tissue)
    truth.update(
        channels=names,
        signal=x,
        mean=mean,
        background=background,
        background_rate=background_rate,
        hot_pixels=hot,
        hot_rate=hot_rate,
        row_factor=row_factor,
        striped_rows=striped,
        specks=specks,
        specks_channel=[m.channel for m in stains if m.role == "specks"],
        failed=[m.channel for m in stains if m.role == "failed"],
    )
    return counts.astype(dtype), truth


def simulate_control(rng, stains, spillover, channel, size, *, background_rate,
                     level=CONTROL_LEVEL, n_persistent_hot=1, dtype=np.float32):
    """Simulate one single-stain control acquisition stained only in ``channel``.

    The field holds round stained spots (radius 4-9 px, level ``level`` with a
    20 % spread); every channel gets the same background, hot-pixel and
    spillover model as the tissue. Returns ``(counts, truth)`` with truth keys
    ``spots`` (int32 labels), ``signal`` (x of the stained channel, float64),
    ``background``, ``hot_pixels``, ``channel``.
    """
    shape = _as_shape(size)
    names = [m.channel for m in stains]
    c = names.index(channel)
    n_spots = max(1, shape[0] * shape[1] // 450)
    centres = np.column_stack([rng.uniform(0, shape[0], n_spots),
                               rng.uniform(0, shape[1], n_spots)])
    radius = rng.uniform(4.0, 9.0, n_spots)
    spots, _ = _paint_cells(shape, centres, radius, radius * rng.uniform(0.8, 1.0, n_spots),
                            rng.uniform(0, np.pi, n_spots))
    per_spot = np.concatenate([[0.0], level * np.exp(rng.normal(0, 0.2, n_spots))])
    x = np.zeros((len(stains),) + shape)
    x[c] = per_spot[spots].astype(np.float16).astype(np.float64)
    mean = np.tensordot(np.asarray(spillover, float), x, axes=(0, 0))
    counts, background, hot, _ = _acquire(rng, mean, np.asarray(background_rate, float),
                                          np.ones(shape[0]), n_persistent_hot=n_persistent_hot)
    truth = {"spots": spots, "signal": x[c], "background": background, "hot_pixels": hot,
             "channel": channel}
    return counts.astype(dtype), truth


# ---------------------------------------------------------------- files

def write_ome_tiff(path, stack, channel_names, *, tile=None):
    """Write a CYX stack as OME-TIFF (zlib, channel names, 1 um pixels).

    The OME UUID is derived from the file name and the creator is fixed, so
    the OME-XML is the same on every regeneration.
    """
    metadata = {
        "UUID": str(uuid.uuid5(uuid.NAMESPACE_URL, f"plexwash-example-stack/{Path(path).name}")),
        "Creator": "plexwash example_stack/generate.py",
        "axes": "CYX",
        "Channel": {"Name": list(channel_names)},
        "PhysicalSizeX": 1.0,
        "PhysicalSizeXUnit": "µm",
        "PhysicalSizeY": 1.0,
        "PhysicalSizeYUnit": "µm",
    }
    tifffile.imwrite(path, stack, ome=True, photometric="minisblack", tile=tile,
                     compression="zlib", compressionargs={"level": 9}, metadata=metadata)


def _save_npz(path, **arrays):
    """``np.savez`` with LZMA members and fixed timestamps (smaller, and the
    same bytes for the same arrays); ``np.load`` reads it as usual."""
    with zipfile.ZipFile(path, "w", compression=zipfile.ZIP_LZMA) as archive:
        for key, value in arrays.items():
            buffer = io.BytesIO()
            np.lib.format.write_array(buffer, np.asanyarray(value), allow_pickle=False)
            info = zipfile.ZipInfo(f"{key}.npy", date_time=(2026, 1, 1, 0, 0, 0))
            info.compress_type = zipfile.ZIP_LZMA
            archive.writestr(info, buffer.getvalue())


def write_plain_tiff(path, stack):
    """Write a CYX stack as a plain multipage TIFF: one page per channel, no
    OME-XML and no shape description (channel names then come from a stain sheet).

    Example
    -------
    >>> import tempfile, os
    >>> path = os.path.join(tempfile.mkdtemp(), "roi.tif")
    >>> write_plain_tiff(path, np.zeros((3, 8, 8), np.uint16))
    >>> with tifffile.TiffFile(path) as tif:
    ...     len(tif.pages), tif.is_ome
    (3, False)
    """
    stack = np.asarray(stack)
    with tifffile.TiffWriter(path) as tif:
        for page in stack:
            tif.write(page, photometric="minisblack", metadata=None)


def write_stains_csv(path, stains):
    """Write ``tag,marker,wash`` for the stain sheet (every channel ``yes``)."""
    with open(path, "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(["tag", "marker", "wash"])
        for m in stains:
            writer.writerow([m.channel, m.label, "yes"])


def write_spillover_csv(path, spillover, channel_names):
    """Write a spillover matrix: header = empty cell + receiving channels,
    then one row per source channel."""
    with open(path, "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow([""] + list(channel_names))
        for name, row in zip(channel_names, spillover, strict=True):
            writer.writerow([name] + [format(float(v), ".10g") for v in row])


def _roi_shapes(size, n_rois):
    """Vary the ROI shapes around ``size`` (non-square ones included)."""
    offsets = [(0, 0), (-32, 32), (32, -64), (-64, -32), (64, 64)]
    return [(max(64, size + offsets[k % 5][0]), max(64, size + offsets[k % 5][1]))
            for k in range(n_rois)]


def simulate_cohort(out_dir, *, random_state=DEFAULT_RANDOM_STATE, n_rois=3, size=320,
                    control_size=160, stains=None, striped_roi=1, n_striped_rows=3,
                    tile=(256, 256)) -> dict:
    """Write a whole demo cohort with controls and truth under ``out_dir``.

    Layout: ``cohort/roi_NN.ome.tiff`` (uint16), ``stains.csv``,
    ``controls/controls.csv`` + ``controls/<channel>.ome.tiff`` (float32),
    ``truth/spillover.csv``, ``truth/roi_NN.npz``, ``truth/controls.npz``,
    ``truth/truth.json``. Same arguments give the same arrays.

    Returns the dict written to ``truth/truth.json``.
    """
    out = Path(out_dir)
    for sub in ("cohort", "controls", "truth"):
        (out / sub).mkdir(parents=True, exist_ok=True)
    stains = default_stains() if stains is None else list(stains)
    names = [m.channel for m in stains]
    matrix_rng = np.random.default_rng([random_state, 0])
    spillover = build_spillover(names, matrix_rng)
    background_rate = draw_background_rates(len(names), matrix_rng)
    write_stains_csv(out / "stains.csv", stains)
    write_spillover_csv(out / "truth" / "spillover.csv", spillover, names)

    rois = []
    for k, shape in enumerate(_roi_shapes(size, n_rois)):
        name = f"roi_{k + 1:02d}"
        rng = np.random.default_rng([random_state, 1, k])
        counts, truth = simulate_roi(
            rng, stains, spillover, shape, background_rate=background_rate,
            n_striped_rows=n_striped_rows if k == striped_roi else 0)
        write_ome_tiff(out / "cohort" / f"{name}.ome.tiff", counts, names,
                       tile=tile if min(shape) >= tile[0] else None)
        if truth["background"].max() > 255:
            raise RuntimeError("background counts overflow uint8")
        _save_npz(
            out / "truth" / f"{name}.npz",
            channels=np.array(names),
            signal=truth["signal"].astype(np.float16),
            cells=truth["cells"].astype(np.uint16),
            cell_type=truth["cell_type"],
            compartment=truth["compartment"],
            region=truth["region"],
            specks=truth["specks"],
            background=truth["background"].astype(np.uint8),
            background_rate=truth["background_rate"],
            hot_pixels=truth["hot_pixels"],
            hot_rate=truth["hot_rate"],
            row_factor=truth["row_factor"],
            striped_rows=truth["striped_rows"],
        )
        rois.append({"name": name, "file": f"cohort/{name}.ome.tiff", "shape": list(shape),
                     "dtype": str(counts.dtype), "n_cells": int(truth["cells"].max()),
                     "n_specks": int(truth["specks"].max()),
                     "striped_rows": truth["striped_rows"].tolist(),
                     "n_hot_pixels": len(truth["hot_pixels"])})

    control_rows, control_truth = [], {}
    stained = [m for m in stains if m.role not in ("dna", "failed")]
    for k, marker in enumerate(stained):
        rng = np.random.default_rng([random_state, 2, k])
        counts, truth = simulate_control(rng, stains, spillover, marker.channel, control_size,
                                         background_rate=background_rate)
        file = f"{marker.channel}.ome.tiff"
        write_ome_tiff(out / "controls" / file, counts, names)
        control_rows.append((file, marker.channel))
        control_truth[f"{marker.channel}_spots"] = truth["spots"].astype(np.uint16)
        control_truth[f"{marker.channel}_hot_pixels"] = truth["hot_pixels"]
    with open(out / "controls" / "controls.csv", "w", newline="") as fh:
        writer = csv.writer(fh, lineterminator="\n")
        writer.writerow(["file", "channel"])
        writer.writerows(control_rows)
    _save_npz(out / "truth" / "controls.npz", **control_truth)

    kinds = spillover_kinds(names)
    summary = {
        "random_state": random_state,
        "channels": names,
        "stains": [asdict(m) for m in stains],
        "failed": [m.channel for m in stains if m.role == "failed"],
        "dim": [m.channel for m in stains if m.role == "dim"],
        "rare": [m.channel for m in stains if m.role == "rare"],
        "specks": [m.channel for m in stains if m.role == "specks"],
        "dna": [m.channel for m in stains if m.role == "dna"],
        "striped_roi": rois[striped_roi]["name"] if 0 <= striped_roi < len(rois) else None,
        "background_rate": dict(zip(names, background_rate.tolist(), strict=True)),
        "spillover_pairs": [{"source": names[i], "receiver": names[j], "kind": kind,
                             "value": float(spillover[i, j])}
                            for (i, j), kind in sorted(kinds.items())],
        "estimable_sources": [m.channel for m in stained],
        "control_level": CONTROL_LEVEL,
        "control_shape": list(_as_shape(control_size)),
        "rois": rois,
        "ranges": {"neighbour": NEIGHBOUR_RANGE, "impurity": IMPURITY_RANGE,
                   "oxide": OXIDE_RANGE, "background_rate": BACKGROUND_RANGE,
                   "hot_rate": HOT_RATE_RANGE, "hot_value": HOT_VALUE_RANGE,
                   "stripe_factor": STRIPE_FACTOR_RANGE},
    }
    with open(out / "truth" / "truth.json", "w") as fh:
        json.dump(summary, fh, indent=1)
        fh.write("\n")
    return summary


if __name__ == "__main__":
    import time

    here = Path(__file__).resolve().parent
    start = time.perf_counter()
    info = simulate_cohort(here)
    total = sum(p.stat().st_size for p in here.rglob("*") if p.is_file()
                and "__pycache__" not in p.parts)
    print(f"wrote {len(info['rois'])} ROIs and {len(info['estimable_sources'])} controls "
          f"in {time.perf_counter() - start:.1f} s; example_stack is {total / 1e6:.2f} MB")
