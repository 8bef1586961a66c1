"""Stagewise: design review of analog signal chains, from sensor to converter."""

import os as _os

# One BLAS thread per call. The engine's matrices are small (tens to a few hundred unknowns),
# where a multi-threaded BLAS only adds hand-offs; the engine parallelises over samples itself
# (engine.spread). On a loaded machine the BLAS threads spin against each other: measured here,
# the step response of a 30-section RC ladder took 1.4 s with OpenBLAS's threads and 0.02 s
# with one. Set before numpy is imported; a value the user set wins.
for _name in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_name, "1")

__version__ = "0.1.0"
