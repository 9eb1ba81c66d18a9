"""Spillover: the matrix, its CSV files, its estimation, and compensation.

Entry ``(i, j)`` of a spillover matrix is the fraction of channel ``i``'s signal that
is measured in channel ``j`` (diagonal 1). A pixel's measured counts are ``y = S^T x``
for its true signal ``x``; compensation recovers ``x >= 0`` by exact non-negative least
squares, pixel by pixel.

Modules
    :mod:`.matrix`: :class:`SpilloverMatrix`, :func:`check_spillover` (the one check of
    a matrix), :func:`align_spillover`.
    :mod:`.files`: :func:`read_spillover` and :func:`write_spillover` (``SPILL.csv``,
    its interval files ``SPILL.low.csv``/``SPILL.high.csv`` and a heatmap PNG).
    :mod:`.masses`: :func:`channel_mass` and :func:`plausible_pairs` (M +/- 1, same
    element, M + 16).
    :mod:`.solver`: :func:`compensate`; its compiled kernels are in :mod:`._nnls`.
    :mod:`.controls`: :func:`estimate_from_controls` (single-stain controls).
    :mod:`.tissue`: :func:`estimate_tissue_pairs` / :func:`estimate_from_tissue` (the
    tissue itself, no controls); its background strata in :mod:`.tissue_background`, the
    not-identifiable list in :mod:`.tissue_pairs`.
    :mod:`.estimates`: what the two estimators share.

Both estimators estimate only the physically plausible pairs of :func:`plausible_pairs`
unless asked for all pairs.
"""

from ..files import interval_paths
from .controls import estimate_from_controls
from .files import read_spillover, write_spillover
from .masses import OXIDE_SHIFT, channel_mass, plausible_pairs
from .matrix import CONDITION_LIMIT, SpilloverMatrix, align_spillover, check_spillover
from .solver import compensate, compensate_array
from .tissue import estimate_from_tissue, estimate_tissue_pairs
from .tissue_pairs import TissueEstimate, TissuePair

__all__ = [
    "CONDITION_LIMIT",
    "OXIDE_SHIFT",
    "SpilloverMatrix",
    "TissueEstimate",
    "TissuePair",
    "align_spillover",
    "channel_mass",
    "check_spillover",
    "compensate",
    "compensate_array",
    "estimate_from_controls",
    "estimate_from_tissue",
    "estimate_tissue_pairs",
    "interval_paths",
    "plausible_pairs",
    "read_spillover",
    "write_spillover",
]
