"""Numbers as plain Python values for JSON (one helper for the battery, grader and reports)."""

from __future__ import annotations

import math

import numpy as np


def plain_scalar(v, *, finite_only=True, repr_other=False):
    """A numpy or Python scalar as the plain Python bool, int or float JSON can carry.

    Parameters
    ----------
    v : object
        The value; numpy booleans, integers and floats become ``bool``, ``int`` and ``float``.
    finite_only : bool, keyword-only
        Turn infinite and NaN floats into ``None`` (JSON has no inf or NaN).
    repr_other : bool, keyword-only
        Give anything that is not a number, ``None`` or a string as its ``repr`` text
        (otherwise it is returned unchanged).

    Returns
    -------
    object
    """
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        v = float(v)
        return v if (math.isfinite(v) or not finite_only) else None
    if repr_other and not (v is None or isinstance(v, str)):
        return repr(v)
    return v
