"""crackstack pipeline: section-topograph series -> 3D volume -> defects -> break-risk assessment.

Stages (one module each): ``ingest``, ``correct``, ``register``, ``reconstruct``, ``segment``,
``measure``, ``assess``, ``report``; shared ``geometry``, ``config`` and ``runfolder``.
"""

import os as _os

# Dask supplies the parallelism; threaded BLAS on top of it oversubscribes the cores and made
# skimage's phase_cross_correlation 20x slower here (64 ms vs 3.4 ms per call). Users can
# still override these variables.
for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_v, "1")

__version__ = "0.1.0"
