"""The daemon runs numpy's OpenBLAS on one thread (daemon/blas.py)."""

from __future__ import annotations

import numpy as np
import sigmad.daemon.engine.blas as blas
from sigmad.daemon.app import Daemon
from sigmad.daemon.config.load import parse_config


def test_set_threads_changes_openblas_and_reports_the_count_it_had():
    if blas.default_threads() is None:    # numpy built on another BLAS: nothing to set
        assert blas.set_threads(1) is None
        return
    before = blas.set_threads(2)
    try:
        assert blas.set_threads(1) == 2
        assert blas.set_threads(1) == 1
        # products still agree with a plain sum (reference: numpy's own pairwise sum)
        a = np.arange(1.0, 10_001.0)
        assert a @ a == np.sum(a * a)
    finally:
        blas.set_threads(before)


def test_a_daemon_sets_one_blas_thread():
    if blas.default_threads() is None:
        return
    before = blas.set_threads(2)
    d = Daemon(parse_config('[daemon]\nhttp = "127.0.0.1:0"\n[[source]]\nsocket = "pull"\n'
                            'bind = "inproc://blas-test"\n[[stream]]\nname = "s"\n'
                            'topic = "s"\nfields = ["v"]\n'))
    d.start()
    try:
        assert blas.set_threads(before) == 1
    finally:
        d.stop()
