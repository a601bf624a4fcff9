"""Statistics: arrays in, results out (no file I/O; the source-space contract only).

Three parts, and three modules that join them:

* :mod:`.models` -- what is fitted at every source x sample: the within-participant
  reduction, the GLM (ordinary least squares) and the mixed model, each behind the
  statistic-kernel contract of :mod:`.models.base` (observed statistic, resampled
  copies);
* :mod:`.corrections` -- how a statistic map becomes corrected p-values: cluster mass
  and extent, TFCE, max-statistic, FDR, and the compiled union-find loops beneath them;
* :mod:`.engine` -- how the resampling runs: backends (serial, threads, processes,
  Dask), memory plans, checkpoints, BLAS threads, memory pages, prefetch hints;
* :mod:`.resampling` (rearrangements and permutation p-values), :mod:`.inference`
  (one contrast: validate -> observed -> null -> result) and :mod:`.results` (the
  result objects handed to the outputs).

Imports flow models / corrections -> engine utilities; the engine's backends run the
models' kernels and the corrections' scorers; :mod:`.inference` sits on top.
"""
