"""The process-wide BLAS hold: nested and concurrent holds, and the count restored afterwards."""

from __future__ import annotations

from threadpoolctl import threadpool_info

from calibration.irt.likelihood import single_threaded_blas


def _blas_threads() -> set[int]:
    return {lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"}


def test_blas_hold_nests_and_restores_the_thread_count() -> None:
    # threadpoolctl reports BLAS's own thread count: one inside any hold, nested or not, and the count from
    # before once the outermost hold ends (an inner one must not restore it early).
    before = _blas_threads()
    with single_threaded_blas():
        assert _blas_threads() == {1}
        with single_threaded_blas():
            assert _blas_threads() == {1}
        assert _blas_threads() == {1}
    assert _blas_threads() == before
