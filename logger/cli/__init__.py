"""The ``crankbeat`` command line.

Importing this package (the console script does, before numpy) keeps BLAS and OpenMP to one
thread unless the user's environment says otherwise: the analysis streams small blocks on one
core, and pool threads only spin on them. On the 2-core bench machine under load a replay of a
2-minute ride took 11.9 s CPU with OpenBLAS's default pool and 5.1 s with one thread.
"""

import os

for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")
