"""Warming the fork server before it forks the run's workers (imported by it: :data:`.pool.PRELOAD`).

A worker forked from a bare fork server spends its first ROI importing what reading and
washing an ROI need (dask.array with xarray, tifffile and its codecs, the wash steps and
their kernel modules) and making the speckle step's chain tables. Importing this module
does both once, in the fork server, so every worker it forks starts with them:

- :data:`MODULES` are imported;
- the speckle step's chain tables for the default recipe are made (:func:`fill_tables`).

No kernel is run or loaded here, so the fork server starts no thread. numba's compiled
kernels are still loaded from its on-disk cache on their first call in each worker: loading
every cached signature ahead of time was tried and left out, because numba then serves a
call from any loaded signature its argument types convert to safely instead of the exact
one, so what a call computes could depend on what the cache happens to hold.

Nothing here is needed: a module that cannot be imported is passed over, and the worker
imports it on first use as it would without this.
"""

from __future__ import annotations

import importlib

#: What a worker's first ROI imports beyond the fork server's preload (measured on a
#: worker's first ROI: reading an OME-TIFF through dask.array, the wash, the quality).
MODULES = ["dask.array", "tifffile", "imagecodecs", "zarr", "plexwash.qc.io.zarr", "plexwash.qc.quality.rows",
           "plexwash.qc.quality.channel", "plexwash.qc.io.roi", "plexwash.qc.staging",
           "plexwash.qc.background", "plexwash.qc.background_context", "plexwash.qc.steps.speckle", "plexwash.qc.steps.hot_pixels",
           "plexwash.qc.steps.compensation", "plexwash.qc.steps.lifting", "plexwash.qc.mask_file",
           "plexwash.qc.quality._fit_kernels", "plexwash.qc.quality._box_kernels",
           "plexwash.qc.quality._kernels", "plexwash.qc.spillover._nnls", "plexwash.qc._staging_kernels",
           "plexwash.qc.steps._kernels", "plexwash.qc.steps._growth_kernels",
           "plexwash.qc.steps._search_kernels", "plexwash.qc._tail_search"]


def import_modules(names=MODULES) -> list[str]:
    """Import the modules; the names of those that could not be imported."""
    missing = []
    for name in names:
        try:
            importlib.import_module(name)
        except Exception:  # an optional codec or an extra not installed: loaded on use if ever
            missing.append(name)
    return missing


def fill_tables() -> None:
    """Make the tables the wash keeps per process for the default recipe: the speckle
    step's chain tables (NumPy only, about 0.2 s; kept by :func:`chain_tables`'s cache, so
    a worker of a run with the default speckle settings finds them made)."""
    from ..recipe import default_recipe
    from ..steps.speckle_chains import chain_tables

    chain_tables(default_recipe().speckle)


def warm() -> None:
    """Import :data:`MODULES` and make the default tables."""
    import_modules()
    try:
        fill_tables()
    except Exception:  # the fork server must start whatever happens here: made on first use then
        pass


warm()  # on import: the fork server imports this module as part of its preload
