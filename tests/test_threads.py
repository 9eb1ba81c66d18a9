"""``qc._threads.one_thread``: the same limits as ``threadpoolctl.threadpool_limits(limits=1)``
(the reference library), restored on exit, without re-scanning libraries on every call."""

from __future__ import annotations

import numpy as np  # noqa: F401  (loads numpy's BLAS, so there is a pool to limit)
import threadpoolctl
from plexwash.qc import _threads


def _blas_threads():
    return [pool["num_threads"] for pool in threadpoolctl.threadpool_info() if pool["user_api"] == "blas"]


def test_one_thread_limits_like_threadpoolctl_and_restores():
    before = _blas_threads()
    with threadpoolctl.threadpool_limits(limits=1, user_api="blas"):
        reference = _blas_threads()
    with _threads.one_thread("blas"):
        assert _blas_threads() == reference  # threadpoolctl's own limit is the reference
    assert _blas_threads() == before


def test_the_controller_is_reused_until_a_module_is_imported(monkeypatch):
    first = _threads._controller()
    assert _threads._controller() is first  # no new scan of the loaded libraries
    import sys
    import types

    monkeypatch.setitem(sys.modules, "plexwash_test_new_module", types.ModuleType("x"))
    assert _threads._controller() is not first  # something new was imported: scan again
