"""One BLAS thread for the engine.

The engine folds every batch on one thread by design. numpy's OpenBLAS keeps a
worker thread per core and wakes them all for every matrix product, however
small; when the machine's other cores are busy, the workers wait on each other.
Measured on a 2-core machine here with another process busy: a moments fold of
20,000 rows took 510 ns a row with OpenBLAS's default threads and 1.3 ns a row
with one. :func:`set_threads` sets OpenBLAS's thread count at run time through
its own C entry point, found among the libraries the process has loaded, so it
works whatever imported numpy first. Where there is no OpenBLAS (another BLAS,
or no ``/proc``), it does nothing and says so by returning None.
"""

from __future__ import annotations

import ctypes
import functools

# OpenBLAS's entry points, under the names numpy's and the distributions' builds use
_SET = ("scipy_openblas_set_num_threads64_", "scipy_openblas_set_num_threads",
        "openblas_set_num_threads64_", "openblas_set_num_threads")
_GET = ("scipy_openblas_get_num_threads64_", "scipy_openblas_get_num_threads",
        "openblas_get_num_threads64_", "openblas_get_num_threads")


@functools.cache
def _entry_points() -> tuple[object, object] | None:
    """OpenBLAS's (set, get) thread-count functions, or None when none is loaded."""
    import numpy  # noqa: F401  (numpy loads its BLAS)

    try:
        with open("/proc/self/maps") as maps:
            paths = {line.split()[-1] for line in maps if "openblas" in line.lower()}
    except OSError:
        return None
    for path in sorted(paths):
        try:
            lib = ctypes.CDLL(path)
        except OSError:
            continue
        setter = next((getattr(lib, n) for n in _SET if hasattr(lib, n)), None)
        getter = next((getattr(lib, n) for n in _GET if hasattr(lib, n)), None)
        if setter is not None and getter is not None:
            setter.argtypes, setter.restype = [ctypes.c_int], None
            getter.argtypes, getter.restype = [], ctypes.c_int
            return setter, getter
    return None


@functools.cache
def default_threads() -> int | None:
    """OpenBLAS's thread count before sigmad first changed it (None: no OpenBLAS)."""
    found = _entry_points()
    return None if found is None else int(found[1]())


def set_threads(n: int) -> int | None:
    """Set OpenBLAS's thread count for the whole process; returns the count it had,
    or None (and changes nothing) when no OpenBLAS is loaded."""
    found = _entry_points()
    if found is None:
        return None
    default_threads()   # remember the count before the first change
    setter, getter = found
    before = int(getter())
    setter(int(n))
    return before
