"""Recorders left open are closed at interpreter exit, before the thread pools their writes use stop."""
from __future__ import annotations

import atexit
import threading
import weakref

_open_recorders: weakref.WeakSet = weakref.WeakSet()
_thread_hook_registered = False


def keep_until_exit(recorder) -> None:
    """Close `recorder` at interpreter exit if it is still open then."""
    _open_recorders.add(recorder)
    _close_before_thread_pools_stop()


def forget(recorder) -> None:
    _open_recorders.discard(recorder)


@atexit.register
def close_all() -> None:
    for recorder in list(_open_recorders):
        try:
            recorder.close()
        except Exception:           # strict mode raises; at interpreter exit there is no caller to tell
            pass


def _close_before_thread_pools_stop() -> None:
    """Also close at threading shutdown, which runs before atexit: by atexit time the thread pools
    that zarr writes through already refuse work, and an open recording would lose every row
    since its last flush. Registered after zarr is imported, so it runs before their exit hooks."""
    global _thread_hook_registered
    if _thread_hook_registered:
        return
    try:
        # CPython's hook for threading shutdown (used by concurrent.futures itself); no public one exists
        threading._register_atexit(close_all)
        _thread_hook_registered = True
    except (AttributeError, RuntimeError):      # no such hook in this Python, or already shutting down
        pass
