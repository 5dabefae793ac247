"""wetlandflow: wetland inventories from local Earth-observation rasters and labelled plots.

The package is laid out by stage of a run, each sub-package importing only from those before it::

    inputs -> features -> training -> validation, models -> mapping, accuracy, explain -> report
           -> pipeline -> ui          (demo: the synthetic landscape; errors, progress: every stage)

The names a notebook user reaches for first are re-exported here and imported on first use.

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
# GDAL's block cache defaults to 5 % of RAM, and every chunked read and the COG build fill it: on a large map
# it, not wetlandflow's own arrays, set the peak memory (measured: 987 MB -> 504 MB for the 4x-area mapping
# benchmark with 128 MB).  A small cache costs nothing here because every window is read once.  A default only.
os.environ.setdefault("GDAL_CACHEMAX", "128")

__version__ = "0.1.0"

CAUTION = (
    "This inventory is a screening-level model product, not a legal wetland delineation. "
    "Defer to local regulations and to qualified wetland professionals for any permit or land decision."
)

import warnings  # noqa: E402

# rasterio.features.rasterize builds its in-memory target without a geotransform and warns about it on
# every call (rasterio 1.4); the transform it is given is applied regardless, so the warning says nothing
# to a user.  Only this one message from that one module is ignored.
warnings.filterwarnings("ignore", message="Dataset has no geotransform", module=r"rasterio\.features")

from ._lazy import exports  # noqa: E402
from .errors import WetlandflowError  # noqa: E402

_all, __getattr__, __dir__ = exports(__name__, {
    "wetlandflow.inputs.project": ["load_project"],
    "wetlandflow.inputs.grid": ["Grid"],
    "wetlandflow.inputs.layers": ["FeatureInputs", "load_inputs"],
    "wetlandflow.features.registry": ["feature", "registry_table"],
    "wetlandflow.features.cube": ["open_cube"],
    "wetlandflow.validation.splitters": ["SpatialBlockKFold", "BufferedSplitter"],
    "wetlandflow.validation.nndm": ["NNDM", "KNNDM"],
    "wetlandflow.models.classifier": ["WetlandClassifier", "ClassScheme"],
    "wetlandflow.models.hierarchy": ["HierarchicalClassifier"],
    "wetlandflow.models.bundle": ["load_bundle"],
    "wetlandflow.accuracy.estimators": ["stratified_estimates", "error_matrix", "accuracy_measures"],
    "wetlandflow.pipeline.run": ["run_project"],
    "wetlandflow.report.appendix": ["write_report"],
    "wetlandflow.demo.landscape": ["make_demo"],
})
__all__ = ["CAUTION", "WetlandflowError", "__version__", *_all]
