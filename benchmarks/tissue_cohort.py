"""A second, independent validation cohort: tissue lying on glass, with known truth.

Run: ``python benchmarks/tissue_cohort.py OUT_DIR [--seed N]``

This generator shares no code and no modelling choices with ``example_stack/generate.py``
and never imports plexwash: it is a check on the engine made from other assumptions.
Only numpy, scipy.ndimage and tifffile are used. Everything is drawn from one
``numpy.random.Generator`` seeded with ``--seed`` (default 12), so a seed gives the same
files on every run.

What a ROI holds (the structures real tissue has):

- **glass and tissue**: an irregular tissue piece (outline = a closed curve whose radius
  is a random Fourier series, with a tear cut into it) lying on glass; the rest of the
  field is glass. Background counts per pixel: 0.006-0.014 on glass, 0.08-0.15 inside
  tissue per channel, modulated inside the tissue by a smooth field (0.75-1.25);
- **zones**: epithelial nests (a thresholded smooth random field), stroma around them
  and one dense lymphoid aggregate in the stroma;
- **cells**: seeds on a jittered hexagonal lattice (spacing per zone, random deletions),
  territories = nearest seed (a Voronoi partition computed with a Euclidean distance
  transform) capped at a radius per cell type, a nucleus around each seed, a one-pixel
  membrane where territories meet, cytoplasm in between. Five cell types: epithelial,
  fibroblast, T cell, B cell, macrophage;
- **cell stains carried by only some types** (per-cell expression lognormal, a share of
  cells of a type negative), one of them **dim** (about 3 counts per pixel on the
  macrophages, about 4 % of the pixels);
- **thin fibres** 1-2 px wide (persistent random walks through the stroma), 1-4 counts
  per pixel, in one channel;
- **a diffuse stromal stain**, 0.3-0.8 counts per pixel over the stroma;
- **rare tiny bright specks** (real signal, 1-3 px, 15-60 counts per pixel), one channel;
- **hot pixels**: single pixels with 100-900 extra counts, per channel, and a few that
  are hot in every channel;
- **a failed stain**: no signal of its own, so it holds only background, hot pixels and
  spillover ghosts;
- **spillover with the shape physics gives it** (channel names carry masses): the
  abundance-sensitivity tails M+1 (0.3-0.8 %) and, for half of the pairs, M-1
  (0.1-0.4 %), oxides M+16 at an element-specific rate (1-3 %), and the isotopic impurity
  of an enriched label into some (half) of the other isotopes of the same element within
  4 mass units (0.2-3.5 %, halved beyond 2 units). So some physically plausible pairs are
  truly zero, and an estimator can report false pairs. The two iridium DNA channels (a
  natural-abundance intercalator) take part in no pair;
- **Poisson counting noise** on signal-plus-spillover and on background;
- two **low-count ROIs** (400 x 400, background about 0.04 counts per pixel in tissue,
  signal halved) without drop-outs, and a **striped ROI** with true row drop-outs (rows
  whose every count is scaled down to 0-15 %).

Output layout::

    OUT_DIR/cohort/<roi>.ome.tiff   uint16 counts, axes CYX, OME channel names, zlib
    OUT_DIR/cohort/stains.csv       tag,marker,wash (every channel washed)
    OUT_DIR/truth/spillover.csv     the true matrix (plexwash's spillover CSV layout)
    OUT_DIR/truth/truth.json        stains, roles, pairs, which ROIs are striped / low-count
    OUT_DIR/truth/<roi>.npz         per-pixel truth, see :func:`load_truth`

The per-ROI truth (``np.load``) holds ``signal`` (C, Y, X) float32: each channel's own
true expected counts before spillover, background, row drop-outs and noise (values are
float16-exact); ``tissue`` (bool), ``zone`` (uint8: 0 glass, 1 stroma, 2 nest,
3 aggregate), ``cells`` (int32 labels), ``cell_type`` (per label, codes into
:data:`CELL_TYPES` + 1, index 0 unused), ``compartment`` (uint8: 0 none, 1 nucleus,
2 cytoplasm, 3 membrane), ``fibres`` (bool), ``specks`` (int32 labels), ``modulation``
(float32 (Y, X), the tissue background field), ``rate_tissue`` / ``rate_glass`` (C,),
``row_factor`` (Y,) and ``hot_pixels`` (K, 4: channel, y, x, counts added; channel -1
when hot in every channel). :func:`load_truth` adds ``background`` (the true background
rate map) and ``expected`` (row factor x (S^T signal + background)).
"""

from __future__ import annotations

import argparse
import csv
import json
import re
import sys
from pathlib import Path

import numpy as np
import tifffile
from scipy import ndimage

DEFAULT_SEED = 12

CELL_TYPES = ("epithelial", "fibroblast", "t_cell", "b_cell", "macrophage")
EPI, FIB, TCELL, BCELL, MAC = 1, 2, 3, 4, 5
GLASS, STROMA, NEST, AGGREGATE = 0, 1, 2, 3
NUCLEUS, CYTOPLASM, MEMBRANE = 1, 2, 3

#: (channel, marker, role, compartments, cell types, level in counts/pixel, positive share)
STAINS = (
    ("In115", "immune-membrane", "cell", "membrane", (TCELL, BCELL, MAC), 25.0, 0.9),
    ("La139", "keratin", "cell", "cytoplasm", (EPI,), 45.0, 0.95),
    ("Pr141", "pan-membrane", "cell", "membrane", (EPI, FIB, TCELL, BCELL, MAC), 20.0, 0.9),
    ("Nd142", "t-membrane", "cell", "membrane", (TCELL,), 50.0, 0.9),
    ("Nd143", "fibre", "fibre", "", (), 0.0, 0.0),
    ("Nd144", "stromal-diffuse", "diffuse", "", (), 0.0, 0.0),
    ("Nd145", "b-membrane", "cell", "membrane", (BCELL,), 35.0, 0.9),
    ("Nd146", "fibroblast-cytoplasm", "cell", "cytoplasm", (FIB,), 30.0, 0.85),
    ("Sm147", "macrophage-dim", "dim", "cytoplasm membrane", (MAC,), 3.0, 1.0),
    ("Nd148", "epithelial-membrane", "cell", "membrane", (EPI,), 40.0, 0.9),
    ("Sm149", "t-cytoplasm", "cell", "cytoplasm", (TCELL,), 20.0, 0.8),
    ("Nd150", "proliferation", "cell", "nucleus", (EPI, TCELL, BCELL), 30.0, 0.25),
    ("Eu151", "granule", "specks", "", (), 0.0, 0.0),
    ("Sm152", "macrophage-cytoplasm", "cell", "cytoplasm", (MAC,), 60.0, 0.9),
    ("Eu153", "epithelial-nuclear", "cell", "nucleus", (EPI,), 30.0, 0.85),
    ("Gd156", "fibroblast-membrane", "cell", "membrane", (FIB,), 25.0, 0.8),
    ("Gd158", "failed-marker", "failed", "membrane", (EPI,), 30.0, 0.9),
    ("Gd160", "b-cytoplasm", "cell", "cytoplasm", (BCELL,), 30.0, 0.85),
    ("Dy162", "myeloid-stromal", "cell", "membrane", (FIB, MAC), 30.0, 0.8),
    ("Er166", "lymphoid-cytoplasm", "cell", "cytoplasm", (TCELL, BCELL), 25.0, 0.85),
    ("Ir191", "DNA-191", "dna", "nucleus", (EPI, FIB, TCELL, BCELL, MAC), 0.0, 1.0),
    ("Ir193", "DNA-193", "dna", "nucleus", (EPI, FIB, TCELL, BCELL, MAC), 0.0, 1.0),
)
#: DNA intercalator counts per nuclear pixel, split by natural iridium abundance
#: (191Ir 37.3 %, 193Ir 62.7 %; IUPAC isotopic compositions, from memory).
DNA_LEVEL = 80.0
IR_ABUNDANCE = {"Ir191": 0.373, "Ir193": 0.627}

#: ROIs: name, (height, width), kind. ``low`` = low-count and stripe-free.
ROIS = (
    ("tissue_a", (480, 520), "plain"),
    ("tissue_b", (440, 560), "plain"),
    ("tissue_low_1", (400, 400), "low"),
    ("tissue_low_2", (400, 400), "low"),
    ("tissue_striped", (440, 500), "striped"),
)

#: Oxide formation, fraction of M measured at M + 16, per element (typical of the
#: lanthanides in ICP-MS, order of magnitude from memory: light lanthanides oxidise more).
OXIDE_RATE = {"La": 0.03, "Pr": 0.026, "Nd": 0.022, "Sm": 0.016, "Eu": 0.011, "Gd": 0.017,
              "Tb": 0.015, "Dy": 0.013, "Ho": 0.012, "Er": 0.011, "Tm": 0.011, "Yb": 0.01,
              "Lu": 0.012, "In": 0.0, "Y": 0.02}
_MASS_NAME = re.compile(r"^([A-Z][a-z]?)(\d{2,3})$")


# ----------------------------------------------------------------------------- spillover


def physical_spillover(names, rng) -> tuple[np.ndarray, list[dict]]:
    """The true spillover matrix (entry (i, j): share of i measured in j) and its pairs."""
    parsed = [_MASS_NAME.match(n) for n in names]
    n = len(names)
    matrix = np.eye(n)
    pairs = []
    for i, a in enumerate(parsed):
        for j, b in enumerate(parsed):
            if i == j or a is None or b is None or "Ir" in (a[1], b[1]):
                continue
            ea, ma, eb, mb = a[1], int(a[2]), b[1], int(b[2])
            parts = {}
            if mb == ma + 1:
                parts["mass+1"] = rng.uniform(0.003, 0.008)
            if mb == ma - 1 and rng.uniform() < 0.5:  # the low-mass tail is often negligible
                parts["mass-1"] = rng.uniform(0.001, 0.004)
            if mb == ma + 16 and OXIDE_RATE.get(ea, 0.0) > 0:
                parts["oxide"] = OXIDE_RATE[ea] * rng.uniform(0.85, 1.15)
            if ea == eb and abs(ma - mb) <= 4 and rng.uniform() < 0.5:
                # an enriched label carries only some of the element's other isotopes
                parts["impurity"] = rng.uniform(0.002, 0.035) * (1.0 if abs(ma - mb) <= 2 else 0.5)
            if parts:
                value = float(np.float16(sum(parts.values())))
                matrix[i, j] = value
                pairs.append({"source": names[i], "receiver": names[j], "value": value,
                              "kinds": sorted(parts)})
    return matrix, pairs


# ----------------------------------------------------------------------------- geometry


def _smooth_field(rng, shape, sigma) -> np.ndarray:
    """A smooth random field scaled to [0, 1]."""
    field = ndimage.gaussian_filter(rng.standard_normal(shape), sigma, mode="wrap")
    return (field - field.min()) / max(np.ptp(field), 1e-12)


def tissue_outline(rng, shape) -> np.ndarray:
    """An irregular tissue piece: radius a random Fourier series of the angle, plus a tear."""
    height, width = shape
    cy = height * rng.uniform(0.4, 0.6)
    cx = width * rng.uniform(0.35, 0.65)
    yy, xx = np.mgrid[0:height, 0:width]
    angle = np.arctan2(yy - cy, xx - cx)
    radius = np.full(shape, 0.42 * min(shape))
    for k in range(1, 8):
        amplitude = 0.12 * min(shape) / k ** 1.2 * rng.uniform(0.3, 1.0)
        radius += amplitude * np.cos(k * angle + rng.uniform(0, 2 * np.pi))
    inside = np.hypot(yy - cy, xx - cx) < radius
    # a tear: a wedge-shaped crack from the edge towards the centre
    direction = rng.uniform(0, 2 * np.pi)
    along = (yy - cy) * np.sin(direction) + (xx - cx) * np.cos(direction)
    across = -(yy - cy) * np.cos(direction) + (xx - cx) * np.sin(direction)
    tear = (along > 0.2 * min(shape)) & (np.abs(across) < 0.02 * along)
    return inside & ~tear


def lattice_seeds(rng, shape, spacing: float, keep: float) -> np.ndarray:
    """Jittered hexagonal lattice points (y, x) with a share ``keep`` of them kept."""
    rows = np.arange(0.0, shape[0], spacing * np.sqrt(3) / 2)
    points = []
    for r, y in enumerate(rows):
        xs = np.arange((r % 2) * spacing / 2, shape[1], spacing)
        points.append(np.column_stack([np.full(xs.size, y), xs]))
    points = np.concatenate(points)
    points += rng.normal(0, 0.22 * spacing, points.shape)
    points = points[rng.uniform(size=len(points)) < keep]
    inside = (points[:, 0] >= 0) & (points[:, 0] < shape[0] - 0.5)
    inside &= (points[:, 1] >= 0) & (points[:, 1] < shape[1] - 0.5)
    return np.rint(points[inside]).astype(int)


def grow_cells(rng, tissue, zone) -> dict:
    """Cells: lattice seeds per zone, Voronoi territories capped by a radius per type."""
    shape = tissue.shape
    seeds, types = [], []
    for zone_code, spacing, keep, mix in (
        (NEST, 11.0, 0.95, (0.9, 0.0, 0.05, 0.0, 0.05)),
        (STROMA, 14.0, 0.7, (0.0, 0.45, 0.18, 0.07, 0.30)),
        (AGGREGATE, 8.0, 0.97, (0.0, 0.0, 0.55, 0.45, 0.0)),
    ):
        points = lattice_seeds(rng, shape, spacing, keep)
        points = points[zone[points[:, 0], points[:, 1]] == zone_code]
        seeds.append(points)
        types.append(rng.choice(np.arange(1, 6), size=len(points), p=np.array(mix) / sum(mix)))
    seeds, types = np.concatenate(seeds), np.concatenate(types)
    n = len(seeds)
    seed_image = np.zeros(shape, np.int32)
    seed_image[seeds[:, 0], seeds[:, 1]] = np.arange(1, n + 1)
    distance, (iy, ix) = ndimage.distance_transform_edt(seed_image == 0, return_indices=True)
    owner = seed_image[iy, ix]
    cell_type = np.concatenate([[0], types]).astype(np.uint8)
    cap = np.array([0.0, 7.5, 6.0, 4.5, 4.5, 7.5])[cell_type] * rng.uniform(0.85, 1.15, n + 1)
    cells = np.where(tissue & (distance <= cap[owner]), owner, 0).astype(np.int32)
    nucleus_radius = cap * rng.uniform(0.45, 0.6, n + 1)
    nucleus = (cells > 0) & (distance <= nucleus_radius[owner])
    edge = np.zeros(shape, bool)
    for axis in (0, 1):
        for shift in (1, -1):
            edge |= np.roll(cells, shift, axis=axis) != cells
    membrane = (cells > 0) & edge & ~nucleus
    compartment = np.zeros(shape, np.uint8)
    compartment[cells > 0] = CYTOPLASM
    compartment[membrane] = MEMBRANE
    compartment[nucleus] = NUCLEUS
    return {"cells": cells, "cell_type": cell_type, "compartment": compartment}


def draw_fibres(rng, stroma, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Persistent random walks 1-2 px wide in the stroma; returns (mask, level map)."""
    shape = stroma.shape
    level = np.zeros(shape, np.float64)
    ys, xs = np.nonzero(stroma)
    for _ in range(count):
        k = rng.integers(len(ys))
        y, x = float(ys[k]), float(xs[k])
        heading = rng.uniform(0, 2 * np.pi)
        width = int(rng.integers(1, 3))
        value = rng.uniform(1.0, 4.0)
        for _ in range(int(rng.uniform(80, 300))):
            heading += rng.normal(0, 0.06)
            y += 0.5 * np.sin(heading)
            x += 0.5 * np.cos(heading)
            points = [(y, x)] if width == 1 else [(y, x), (y + np.cos(heading), x - np.sin(heading))]
            for py, px in points:
                iy, ix = int(round(py)), int(round(px))
                if 0 <= iy < shape[0] and 0 <= ix < shape[1] and stroma[iy, ix]:
                    level[iy, ix] = max(level[iy, ix], value)
    return level > 0, level


def place_specks(rng, tissue, count: int) -> tuple[np.ndarray, np.ndarray]:
    """Tiny bright specks of 1-3 px; returns (labels, level map)."""
    labels = np.zeros(tissue.shape, np.int32)
    level = np.zeros(tissue.shape)
    ys, xs = np.nonzero(tissue)
    offsets = ((0, 0), (0, 1), (1, 0), (1, 1), (-1, 0), (0, -1))
    for label in range(1, count + 1):
        k = rng.integers(len(ys))
        y, x = ys[k], xs[k]
        size = int(rng.integers(1, 4))
        chosen = [offsets[0]] + [offsets[i] for i in rng.choice(np.arange(1, 6), size - 1, replace=False)]
        peak = rng.uniform(15.0, 60.0)
        for m, (dy, dx) in enumerate(chosen):
            py, px = y + dy, x + dx
            if 0 <= py < tissue.shape[0] and 0 <= px < tissue.shape[1] and labels[py, px] == 0:
                labels[py, px] = label
                level[py, px] = peak * (1.0 if m == 0 else 0.6)
    return labels, level


# ----------------------------------------------------------------------------- one ROI


def simulate_roi(rng, shape, kind: str, spillover: np.ndarray) -> tuple[np.ndarray, dict]:
    """Measured counts (C, Y, X) uint16 and the truth dict of one ROI."""
    names = [p[0] for p in STAINS]
    tissue = tissue_outline(rng, shape)
    nest = _smooth_field(rng, shape, 22) > 0.55
    zone = np.where(tissue, np.where(nest, NEST, STROMA), GLASS).astype(np.uint8)
    stroma_pixels = np.argwhere(zone == STROMA)
    centre = stroma_pixels[rng.integers(len(stroma_pixels))]
    yy, xx = np.mgrid[0:shape[0], 0:shape[1]]
    aggregate = np.hypot(yy - centre[0], xx - centre[1]) < rng.uniform(30, 45)
    zone[aggregate & tissue] = AGGREGATE
    grown = grow_cells(rng, tissue, zone)
    cells, cell_type, compartment = grown["cells"], grown["cell_type"], grown["compartment"]
    per_cell_type = cell_type[cells]
    stroma = zone == STROMA
    fibres, fibre_level = draw_fibres(rng, stroma, int(rng.integers(18, 30)))
    specks, speck_level = place_specks(rng, tissue, int(rng.integers(20, 40)))
    diffuse = np.where(stroma & (compartment != NUCLEUS),
                       0.3 + 0.5 * _smooth_field(rng, shape, 30), 0.0)
    scale = 0.5 if kind == "low" else 1.0

    signal = np.zeros((len(STAINS),) + shape, np.float32)
    n_cells = len(cell_type)
    dna_per_cell = DNA_LEVEL * rng.lognormal(0, 0.2, n_cells)
    for c, (name, _marker, role, where, types, level, share) in enumerate(STAINS):
        if role == "fibre":
            plane = fibre_level
        elif role == "diffuse":
            plane = diffuse
        elif role == "specks":
            plane = speck_level
        elif role == "failed":
            plane = np.zeros(shape)
        elif role == "dna":
            plane = np.where(compartment == NUCLEUS, dna_per_cell[cells] * IR_ABUNDANCE[name], 0.0)
        else:
            spread = 0.15 if role == "dim" else 0.35
            expression = level * rng.lognormal(0, spread, n_cells) * (rng.uniform(size=n_cells) < share)
            codes = [{"nucleus": NUCLEUS, "cytoplasm": CYTOPLASM, "membrane": MEMBRANE}[w]
                     for w in where.split()]
            carried = np.isin(per_cell_type, types) & np.isin(compartment, codes)
            plane = np.where(carried, expression[cells], 0.0)
        signal[c] = plane * (1.0 if role == "dna" else scale)
    signal = signal.astype(np.float16).astype(np.float32)  # float16-exact truth

    rate_tissue = rng.uniform(0.08, 0.15, len(STAINS)) * (0.33 if kind == "low" else 1.0)
    rate_glass = rng.uniform(0.006, 0.014, len(STAINS)) * (0.5 if kind == "low" else 1.0)
    modulation = (0.75 + 0.5 * _smooth_field(rng, shape, 40)).astype(np.float32)
    row_factor = np.ones(shape[0])
    if kind == "striped":
        first = rng.choice(np.arange(20, shape[0] - 22), 3, replace=False)
        rows = np.sort(np.concatenate([first, [first[0] + 1]]))
        row_factor[rows] = rng.uniform(0.0, 0.15, rows.size)
    truth = {
        "channels": np.array(names), "signal": signal, "tissue": tissue, "zone": zone,
        "cells": cells, "cell_type": cell_type, "compartment": compartment, "fibres": fibres,
        "specks": specks, "modulation": modulation, "rate_tissue": rate_tissue,
        "rate_glass": rate_glass, "row_factor": row_factor,
    }
    background = background_map(truth)
    spilled = np.tensordot(spillover, signal.astype(np.float64), axes=(0, 0))
    rows = row_factor[None, :, None]
    counts = rng.poisson(rows * spilled) + rng.poisson(rows * background)

    hot = []
    per_channel = rng.poisson(2.5e-4 * shape[0] * shape[1], len(STAINS))
    for c, k in enumerate(per_channel):
        hot += [(c, rng.integers(shape[0]), rng.integers(shape[1]), rng.integers(100, 900))
                for _ in range(k)]
    hot += [(-1, rng.integers(shape[0]), rng.integers(shape[1]), rng.integers(100, 900))
            for _ in range(int(rng.integers(2, 5)))]
    for c, y, x, added in hot:
        if c < 0:
            counts[:, y, x] += added
        else:
            counts[c, y, x] += added
    truth["hot_pixels"] = np.array(hot, np.int64).reshape(-1, 4)
    return np.clip(counts, 0, 65535).astype(np.uint16), truth


def background_map(truth: dict) -> np.ndarray:
    """True background rate (C, Y, X) of a ROI: glass rate off tissue, modulated tissue rate on it."""
    tissue = np.asarray(truth["tissue"], bool)
    modulation = np.asarray(truth["modulation"], np.float64)
    inside = np.asarray(truth["rate_tissue"])[:, None, None] * modulation
    return np.where(tissue, inside, np.asarray(truth["rate_glass"])[:, None, None])


def load_truth(truth_dir, roi: str) -> dict:
    """The truth of one ROI with ``spillover`` (C, C), ``background`` and ``expected`` added.

    ``expected`` is the mean of the measured counts without hot pixels:
    ``row_factor * (S^T signal + background)``; ``hot`` is a (C, Y, X) bool map of hot
    pixels. ``roles`` maps role -> channel names (from ``truth.json``).
    """
    truth_dir = Path(truth_dir)
    with np.load(truth_dir / f"{roi}.npz", allow_pickle=False) as data:
        truth = {k: data[k] for k in data.files}
    names = [str(c) for c in truth["channels"]]
    truth["channels"] = names
    info = json.loads((truth_dir / "truth.json").read_text())
    truth["info"] = info
    truth["roles"] = info["roles"]
    with open(truth_dir / "spillover.csv", newline="") as fh:
        rows = list(csv.reader(fh))
    order = [rows[0][1:].index(c) for c in names]
    values = np.array([[float(v) for v in r[1:]] for r in rows[1:]])
    truth["spillover"] = values[np.ix_(order, order)]
    truth["background"] = background_map(truth)
    rows = truth["row_factor"][None, :, None]
    spilled = np.tensordot(truth["spillover"], truth["signal"].astype(np.float64), axes=(0, 0))
    truth["spilled"] = rows * spilled
    truth["expected"] = rows * (spilled + truth["background"])
    hot = np.zeros(truth["signal"].shape, bool)
    for c, y, x, _added in truth["hot_pixels"]:
        if c < 0:
            hot[:, y, x] = True
        else:
            hot[c, y, x] = True
    truth["hot"] = hot
    return truth


# ----------------------------------------------------------------------------- cohort


def write_cohort(out_dir, *, seed: int = DEFAULT_SEED) -> list[Path]:
    """Write the cohort and its truth under ``out_dir``; returns the ROI paths."""
    out_dir = Path(out_dir)
    (out_dir / "cohort").mkdir(parents=True, exist_ok=True)
    (out_dir / "truth").mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(seed)
    names = [p[0] for p in STAINS]
    spillover, pairs = physical_spillover(names, rng)
    paths, rois = [], []
    for roi, shape, kind in ROIS:
        counts, truth = simulate_roi(rng, shape, kind, spillover)
        path = out_dir / "cohort" / f"{roi}.ome.tiff"
        tifffile.imwrite(path, counts, ome=True, photometric="minisblack", compression="zlib",
                         metadata={"axes": "CYX", "Channel": {"Name": names},
                                   "PhysicalSizeX": 1.0, "PhysicalSizeY": 1.0})
        np.savez_compressed(out_dir / "truth" / f"{roi}.npz", **truth)
        paths.append(path)
        dim = [i for i, p in enumerate(STAINS) if p[2] == "dim"][0]
        rois.append({"name": roi, "shape": list(shape), "kind": kind,
                     "striped_rows": [int(r) for r in np.flatnonzero(truth["row_factor"] < 1)],
                     "tissue_fraction": float(truth["tissue"].mean()),
                     "n_cells": int(len(truth["cell_type"]) - 1),
                     "dim_fraction": float((truth["signal"][dim] > 0).mean())})
    roles: dict[str, list[str]] = {}
    for p in STAINS:
        roles.setdefault(p[2], []).append(p[0])
    info = {"seed": seed, "channels": names, "roles": roles,
            "stains": [{"channel": p[0], "marker": p[1], "role": p[2], "compartment": p[3],
                       "cell_types": [CELL_TYPES[t - 1] for t in p[4]], "level": p[5],
                       "share": p[6]} for p in STAINS],
            "spillover_pairs": pairs, "rois": rois,
            "striped": [r["name"] for r in rois if r["kind"] == "striped"],
            "low_count": [r["name"] for r in rois if r["kind"] == "low"]}
    (out_dir / "truth" / "truth.json").write_text(json.dumps(info, indent=1))
    with open(out_dir / "truth" / "spillover.csv", "w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow([""] + names)
        for name, row in zip(names, spillover, strict=True):
            writer.writerow([name] + [repr(float(v)) for v in row])
    with open(out_dir / "cohort" / "stains.csv", "w", newline="") as fh:
        writer = csv.writer(fh)
        writer.writerow(["tag", "marker", "wash"])
        for p in STAINS:
            writer.writerow([p[0], p[1], "yes"])
    return paths


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out_dir", type=Path)
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    args = parser.parse_args(argv)
    for path in write_cohort(args.out_dir, seed=args.seed):
        print(path)
    return 0


if __name__ == "__main__":
    sys.exit(main())
