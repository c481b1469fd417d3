"""Dask worker preload: this worker pretends to run another version of audiodsm."""

import audiodsm

audiodsm.__version__ = "0.0.0-other"
