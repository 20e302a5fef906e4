"""The swarmrig experiment: scenarios, launch, faults, telemetry, metrics, run directories."""

import os as _os

for _v in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    _os.environ.setdefault(_v, "1")

__all__: list[str] = []
