"""One BLAS thread for the engine.

The engine folds every batch on one thread by design. numpy's OpenBLAS keeps a
worker thread per core and wakes them all for every matrix product, however
small; when the machine's other cores are busy, the workers wait on each other.
Measured on a 2-core machine here with another process busy: a moments fold of
20,000 rows took 510 ns a row with OpenBLAS's default threads and 1.3 ns a row
with one. :func:`set_threads` sets the BLAS thread count at run time through
threadpoolctl, which finds the BLAS libraries the process has loaded whatever
imported numpy first. Where numpy has no BLAS that threadpoolctl knows, it does
nothing and says so by returning None.
"""

from __future__ import annotations

import functools

from threadpoolctl import ThreadpoolController


@functools.cache
def _controller() -> ThreadpoolController:
    import numpy  # noqa: F401  (numpy loads its BLAS)

    return ThreadpoolController()


def _blas():
    """threadpoolctl's view of the loaded BLAS libraries (empty when there is none)."""
    return _controller().select(user_api="blas")


@functools.cache
def default_threads() -> int | None:
    """The BLAS thread count before sigmad first changed it (None: no BLAS found)."""
    blas = _blas()
    return max(lib.num_threads for lib in blas.lib_controllers) if blas.lib_controllers else None


def set_threads(n: int) -> int | None:
    """Set the BLAS thread count for the whole process; returns the count it had,
    or None (and changes nothing) when no BLAS is loaded."""
    blas = _blas()
    if not blas.lib_controllers:
        return None
    default_threads()   # remember the count before the first change
    before = max(lib.num_threads for lib in blas.lib_controllers)
    for lib in blas.lib_controllers:
        lib.set_num_threads(int(n))
    return before
