"""Aligned plain-text tables: the library's :func:`audiodsm.evaluate.tables.aligned_lines`.

Kept so that ``cli/design.py`` (thinned separately) still finds it here; new code imports
:mod:`audiodsm.evaluate.tables`.
"""

from __future__ import annotations

from audiodsm.evaluate.tables import aligned_lines

__all__ = ["aligned_lines"]
