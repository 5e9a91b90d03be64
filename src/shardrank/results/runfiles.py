"""The only code that knows the file names inside a run directory.

::

    RUN/
      run.json            options, store fingerprint, status, convergence history, timings
      scores.npy          float64[N] scores by node id (memory-mappable); written at the end
      scores.parquet      key, score (in id order); written at the end
      checkpoints/        iter-NNNNNN/{scores.npy, state.json}; the newest two are kept
"""

from __future__ import annotations

RUN_JSON = "run.json"
SCORES_NPY = "scores.npy"
SCORES_PARQUET = "scores.parquet"
