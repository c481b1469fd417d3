"""Compiled inner loops, and nothing else.

Every function here is ``@njit(cache=True, nogil=True)`` without fastmath (reordering would
change quantizer decisions). Kernels take contiguous float64/int arrays and scalars, write into
caller-allocated output and state arrays, and validate nothing: the public wrappers in the stage
modules validate, convert, allocate and call. Each kernel has a slow pure-Python twin in the
tests.
"""

from __future__ import annotations

import numpy as np  # noqa: F401
from numba import njit  # noqa: F401

# ---------------------------------------------------------------------------------------------
# Modulator loops (stages/modulator.py)
# ---------------------------------------------------------------------------------------------




# ---------------------------------------------------------------------------------------------
# Rate conversion (stages/upsample.py)
# ---------------------------------------------------------------------------------------------




# ---------------------------------------------------------------------------------------------
# Output stages (stages/output_stage.py)
# ---------------------------------------------------------------------------------------------




# ---------------------------------------------------------------------------------------------
# Reconstruction filters (stages/reconstruct.py)
# ---------------------------------------------------------------------------------------------




# ---------------------------------------------------------------------------------------------
# Measurement helpers (measure/*)
# ---------------------------------------------------------------------------------------------
