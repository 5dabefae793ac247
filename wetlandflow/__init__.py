"""wetlandflow: wetland inventories from local Earth-observation rasters and labelled plots.

The inventory this package produces is a screening-level model product, not a
legal wetland delineation: defer to local regulations and qualified wetland
professionals for any permit or land decision.
"""

from __future__ import annotations

import os

# OpenMP threads that spin while waiting make XGBoost training up to 10x slower when the cores are shared
# (dask workers, a notebook kernel, another process).  Passive waiting costs nothing measurable when the
# machine is idle.  Only a default: a value the user set is kept.  It must be set before libgomp loads.
os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")

__version__ = "0.1.0"

CAUTION = (
    "This inventory is a screening-level model product, not a legal wetland delineation. "
    "Defer to local regulations and to qualified wetland professionals for any permit or land decision."
)

from .errors import WetlandflowError  # noqa: E402
from .grid import Grid  # noqa: E402

__all__ = ["CAUTION", "Grid", "WetlandflowError", "__version__"]
