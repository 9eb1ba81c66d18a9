"""The cleaning steps: hot pixels, compensation, speckle, declared once in :mod:`.registry`.

Each step is a pure function ``array in -> array out (+ removed map, + stats)`` on a
(C, Y, X) stack, numpy or dask; :mod:`.lifting` lifts the plane kernels to stacks and to
dask in one place.

The package imports nothing itself, so that modules the steps build on (the spillover
estimators use the hot-pixel step) can import one step without the registry.
"""
