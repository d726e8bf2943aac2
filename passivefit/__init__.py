"""passivefit: passive membrane properties from whole-cell current-clamp recordings."""

import os

__version__ = "0.1.0"

#: Thread counts of the linear-algebra libraries numpy may use
BLAS_THREADS = ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")


def one_blas_thread() -> None:
    """Ask numpy's linear-algebra library for one thread unless the user set a count.

    The fits' matrices are small: more threads only spin (on two cores the same wall
    time for 40–70 % more CPU; README, Benchmarks). Takes effect in processes that import
    numpy after it (the command line, batch workers).
    """
    for name in BLAS_THREADS:
        os.environ.setdefault(name, "1")
