"""One BLAS thread for vidodo's work.

vidodo's linear algebra is many small least-squares fits (3 x 3 to 2000 x 9 SVDs and
solves): more BLAS threads gain nothing on them, and on a loaded machine OpenBLAS's
waiting threads made each such SVD a hundred times slower (measured: 0.3 ms alone,
30-130 ms under load, ``benchmarks/preflight_speed.py``). The command line runs every
verb inside :func:`one_blas_thread`; Python callers may do the same.
"""

from __future__ import annotations

import contextlib

__all__ = ["one_blas_thread"]


@contextlib.contextmanager
def one_blas_thread():
    """Limit NumPy's and SciPy's BLAS to one thread inside the ``with`` block."""
    import scipy.linalg  # noqa: F401  (loads SciPy's own BLAS, so that the limit reaches it)
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1, user_api="blas"):
        yield
