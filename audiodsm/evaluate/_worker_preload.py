"""Imported once by the local cluster's process server, before it forks any worker.

:func:`audiodsm.evaluate.cluster.warm_up_loops` runs here: the battery's modules are imported
and its compiled loops loaded from numba's on-disk cache (compiled on a fresh checkout) in the
one process the workers are forked from. Every worker then starts with all of it in memory,
and so does a worker the nanny restarts after a crash. ``SECONDS`` keeps how long it took,
for the cluster's report (each worker inherits the value).
"""

from audiodsm.evaluate.cluster import warm_up_loops

#: Seconds the warm-up took in the process server (None when it failed).
SECONDS = warm_up_loops()
