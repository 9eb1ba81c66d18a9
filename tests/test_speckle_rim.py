"""The speckle rim rule: background counts on the rim of bright cells.

A background pixel next to a bright cell has the cell's pixels in its window, so the density
test (an exact one-sided binomial test on positive neighbours, the core-point rule of DBSCAN,
Ester et al. 1996) calls it dense and keeps it. The rim rule judges such a pixel (some, but
under half, of its neighbours bright) on its other neighbours alone, with the same exact
binomial test at ``rim_alpha`` (reference: ``scipy.stats.binom``). Synthetic data: Poisson
background (``numpy.random.Generator.poisson``) and discs of Poisson signal.
"""

from __future__ import annotations

import numpy as np
from plexwash.qc.steps.speckle import remove_speckle
from scipy import ndimage as ndi
from scipy import stats


def _cells(seed: int = 1, background: float = 0.12, brightness: float = 12.0):
    rng = np.random.default_rng(seed)
    img = rng.poisson(background, (240, 240)).astype(np.float32)
    yy, xx = np.mgrid[:240, :240]
    cell = np.zeros(img.shape, bool)
    for cy in range(30, 240, 60):
        for cx in range(30, 240, 60):
            cell |= (yy - cy) ** 2 + (xx - cx) ** 2 <= 36
    img[cell] += rng.poisson(brightness, int(cell.sum()))
    rim = ndi.binary_dilation(cell, iterations=2) & ~cell  # scipy.ndimage.binary_dilation
    return img, cell, rim


def test_rim_background_removed_and_cells_kept():
    img, cell, rim = _cells()
    old, _, _ = remove_speckle(img, rim_alpha=0.0)
    new, _, st = remove_speckle(img)
    kept_old = old[rim].sum() / img[rim].sum()
    kept_new = new[rim].sum() / img[rim].sum()
    assert kept_old > 0.5  # the density test alone keeps most of the rim (measured 0.7)
    # rim pixels are background: the rim rule keeps one with probability about rim_alpha
    assert kept_new < 0.1
    # the bright cells keep their counts (a cell's own edge pixel of few counts may go: 0.05 % here)
    assert new[cell].sum() >= 0.998 * img[cell].sum()


def test_rim_rule_keeps_dim_cells_beside_bright_ones():
    """A dim cell (3 counts a pixel, below the value cut) touching a bright one keeps its counts:
    its own dim pixels make the rest of the window dense."""
    img, cell, _ = _cells(seed=2)
    rng = np.random.default_rng(3)
    yy, xx = np.mgrid[:240, :240]
    dim = ((yy - 30) ** 2 + (xx - 43) ** 2 <= 25) & ~cell  # touches the bright cell at (30, 30)
    img[dim] = rng.poisson(3.0, int(dim.sum())) + rng.poisson(0.12, int(dim.sum()))
    new, _, st = remove_speckle(img)
    assert st["value_threshold"] > 4  # the dim cell is not kept by value
    assert new[dim].sum() >= 0.98 * img[dim].sum()


def test_rim_false_keep_rate_is_binomial():
    """On the rim of bright cells the share of positive background pixels kept is at most about
    rim_alpha plus what the line and value tests keep (binomial bound at 4 sigma)."""
    img, cell, rim = _cells(seed=4, background=0.2)
    new, _, _ = remove_speckle(img, line_half=0, wide_radius=0)
    positive = rim & (img > 0.5)
    n = int(positive.sum())
    kept = int((new[positive] > 0).sum())
    assert kept <= stats.binom.isf(3e-5, n, 0.01 + 0.003)  # scipy.stats.binom, one-sided
