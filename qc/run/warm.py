"""Warming the fork server before it forks the run's workers (imported by it: :data:`.pool.PRELOAD`).

A worker forked from a bare fork server spends its first ROI importing what reading and
washing an ROI need (dask.array with xarray, tifffile and its codecs, the wash steps) and
having numba load every compiled kernel from its on-disk cache (numba loads a cached
kernel on its first call). Importing this module does both once, in the fork server, so
every worker it forks starts with them:

- :data:`MODULES` are imported;
- the speckle step's chain tables for the default recipe are made (:func:`fill_tables`);
- every numba kernel of the engine whose on-disk cache is current is loaded from that
  cache (:func:`load_cached_kernels`): no kernel is run and nothing is compiled, so the
  fork server starts no thread (numba's threading layer starts on the first call of a
  ``parallel=True`` kernel, and those are left to load on their first call as before).

A kernel loaded here is the same compiled code its first call would load in the worker.
Nothing here is needed: a module that cannot be imported or a cache that cannot be read
is passed over, and the worker loads it on first use as it would without this.
"""

from __future__ import annotations

import importlib
import sys

#: What a worker's first ROI imports beyond the fork server's preload (measured on a
#: worker's first ROI: reading an OME-TIFF through dask.array, the wash, the quality).
MODULES = ["dask.array", "tifffile", "imagecodecs", "zarr", "plexwash.qc.io.zarr", "plexwash.qc.quality.rows",
           "plexwash.qc.quality.channel", "plexwash.qc.io.roi", "plexwash.qc.staging",
           "plexwash.qc.background", "plexwash.qc.steps.speckle", "plexwash.qc.steps.hot_pixels",
           "plexwash.qc.steps.compensation", "plexwash.qc.steps.lifting", "plexwash.qc.mask_file",
           "plexwash.qc.quality._fit_kernels", "plexwash.qc.quality._box_kernels",
           "plexwash.qc.quality._kernels", "plexwash.qc.spillover._nnls", "plexwash.qc._staging_kernels",
           "plexwash.qc.steps._kernels", "plexwash.qc.steps._growth_kernels",
           "plexwash.qc.steps._search_kernels", "plexwash.qc._tail_search"]

#: The package whose kernels are loaded.
PACKAGE = "plexwash.qc"


def import_modules(names=MODULES) -> list[str]:
    """Import the modules; the names of those that could not be imported."""
    missing = []
    for name in names:
        try:
            importlib.import_module(name)
        except Exception:  # an optional codec or an extra not installed: loaded on use if ever
            missing.append(name)
    return missing


def engine_kernels(package: str = PACKAGE) -> list:
    """The numba kernels (dispatchers) defined in the imported modules of ``package``
    that are cached on disk and not ``parallel=True``."""
    try:
        from numba.core.dispatcher import Dispatcher
    except ImportError:  # pragma: no cover - numba is a dependency
        return []
    kernels = []
    for name, module in list(sys.modules.items()):
        if module is None or not (name == package or name.startswith(package + ".")):
            continue
        for value in list(vars(module).values()):
            if (isinstance(value, Dispatcher) and getattr(value, "__module__", None) == name
                    and getattr(value, "_cache", None) is not None
                    and not value.targetoptions.get("parallel")):
                kernels.append(value)
    return kernels


def load_cached_kernels(package: str = PACKAGE) -> int:
    """Load every signature of the :func:`engine_kernels` found in their current on-disk
    cache (numba's cache index); the number of signatures loaded. Nothing is compiled: a
    signature whose cache cannot be loaded is left to its first call."""
    loaded = 0
    for kernel in engine_kernels(package):
        try:
            cache = kernel._cache
            for key in list(cache._cache_file._load_index()):
                signature = key[0]
                if signature in kernel.overloads:
                    continue
                result = cache.load_overload(signature, kernel.targetctx)
                if result is not None:
                    kernel.add_overload(result)
                    loaded += 1
        except Exception:  # a numba without these internals, an unreadable cache
            continue
    return loaded


def fill_tables() -> None:
    """Make the tables the wash keeps per process for the default recipe: the speckle
    step's chain tables (NumPy only, about 0.2 s; kept by :func:`chain_tables`'s cache, so
    a worker of a run with the default speckle settings finds them made)."""
    from ..recipe import default_recipe
    from ..steps.speckle_chains import chain_tables

    chain_tables(default_recipe().speckle)


def warm() -> int:
    """Import :data:`MODULES`, make the default tables and load the engine's cached
    kernels; the signatures loaded."""
    import_modules()
    try:
        fill_tables()
    except Exception:  # the fork server must start whatever happens here: made on first use then
        pass
    return load_cached_kernels()


warm()  # on import: the fork server imports this module as part of its preload
