"""One BLAS thread: the vector operations of fe3d's Krylov solvers run faster without threads.

The conjugate-gradient, GMRES and BiCGSTAB loops spend much of their time in level-1 BLAS
(dot products, norms, axpy) on vectors of 10⁴–10⁶ entries, where OpenBLAS threads cost more
in start-up and waiting than they gain; on the 2-core development machine, shared with other
work, they made the demo's transport 6× slower (33.7 s against 5.6 s for the same five
years, measured with cProfile). Sparse products and SuperLU do not use BLAS threads, so
nothing is lost. ``FE3D_BLAS_THREADS`` overrides the count.
"""

from __future__ import annotations

import os

__all__ = ["limit_blas_threads"]

_applied: list[int] = []


def limit_blas_threads() -> None:
    """Limit the BLAS libraries loaded by numpy and scipy to ``FE3D_BLAS_THREADS`` threads
    (default 1) for the rest of the process; later calls do nothing."""
    if _applied:
        return
    import numpy  # noqa: F401  (load the BLAS libraries before limiting them)
    import scipy.sparse.linalg  # noqa: F401
    from threadpoolctl import threadpool_limits

    n = int(os.environ.get("FE3D_BLAS_THREADS", "1"))
    threadpool_limits(limits=n, user_api="blas")
    _applied.append(n)
