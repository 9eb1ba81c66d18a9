"""One BLAS/OpenMP thread for a block of work, without re-scanning the loaded libraries.

``threadpoolctl.threadpool_limits`` walks every loaded shared library on each call (a few
ms): a wash or a quality pass calls it once per channel task, which made it a visible part
of a small ROI's cost. A ``ThreadpoolController`` is made once and reused while no module
has been imported since (a new import may load a new thread pool, e.g. scipy's BLAS).
"""

from __future__ import annotations

import sys
import threading

_lock = threading.Lock()
_cached: tuple[object, int] = (None, -1)


def _controller():
    global _cached
    with _lock:
        controller, seen = _cached
        if controller is None or seen != len(sys.modules):
            from threadpoolctl import ThreadpoolController

            controller = ThreadpoolController()
            _cached = (controller, len(sys.modules))
        return controller


def one_thread(user_api: str | None = None):
    """Context manager: the loaded thread pools (``user_api``: ``"blas"``, ``"openmp"`` or
    all) limited to one thread, restored on exit (as ``threadpool_limits(limits=1)``)."""
    return _controller().limit(limits=1, user_api=user_api)
