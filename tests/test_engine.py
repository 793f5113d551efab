"""Engine choice, numba as an optional import, and the thread policy of hot sections."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from threadpoolctl import threadpool_info

from geoexp import _engine
from geoexp.errors import InputError, MissingPackageError


def test_engine_names():
    assert _engine.resolve_engine("numpy") == "numpy"
    assert _engine.resolve_engine("auto") in ("numba", "numpy")
    with pytest.raises(InputError, match="engine must be"):
        _engine.resolve_engine("fortran")


def test_without_numba_auto_falls_back_once_and_numba_is_refused(monkeypatch):
    monkeypatch.setattr(_engine, "_numba", None)
    monkeypatch.setattr(_engine, "_noted", False)
    with pytest.warns(RuntimeWarning, match="pip install numba"):
        assert _engine.resolve_engine("auto") == "numpy"
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # the note is given once per process
        assert _engine.resolve_engine("auto") == "numpy"
    with pytest.raises(MissingPackageError, match="pip install numba") as err:
        _engine.resolve_engine("numba")
    assert isinstance(err.value, ImportError)


def test_numpy_engine_never_needs_numba(monkeypatch):
    from geoexp.exposure._kernels import pair_popcounts

    monkeypatch.setattr(_engine, "_numba", None)
    bits = np.array([[0b1011], [0b0110]], dtype=np.uint64)
    out = pair_popcounts(bits, bits, np.array([0, 0]), np.array([0, 1]), engine="numpy")
    # popcount(1011) = 3, popcount(1011 & 0110) = popcount(0010) = 1, by hand
    assert out.tolist() == [3, 1]


def _blas_threads() -> list[int]:
    return [lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"]


def test_compute_threads_limits_blas_and_numba_and_restores():
    numba = _engine.numba_module()
    blas_before = _blas_threads()
    numba_before = numba.get_num_threads() if numba is not None else None
    with _engine.compute_threads() as n_threads:
        assert 1 <= n_threads <= _engine.cores()
        assert all(t == 1 for t in _blas_threads())
        if numba is not None:
            assert numba.get_num_threads() == n_threads
            assert n_threads <= numba.config.NUMBA_NUM_THREADS
    assert _blas_threads() == blas_before
    if numba is not None:
        assert numba.get_num_threads() == numba_before


def test_limit_threads_caps_the_kernels_threads_and_restores():
    before = _engine.thread_count()
    with _engine.limit_threads(1):
        assert _engine.thread_count() == 1
        with _engine.compute_threads() as n_threads:
            assert n_threads == 1
            numba = _engine.numba_module()
            if numba is not None:
                assert numba.get_num_threads() == 1
        with _engine.limit_threads(4):  # an inner cap never raises an outer one
            assert _engine.thread_count() == 1
    assert _engine.thread_count() == before
    with pytest.raises(InputError, match="n_threads"):
        with _engine.limit_threads(0):
            pass
