"""Stage 2, features: the feature registry, the built-in feature functions and the feature cube.

Takes the aligned inputs (:class:`~wetlandflow.inputs.FeatureInputs`) and a selection of feature or domain
names, and returns the cube: an ``xarray.Dataset`` on the grid, one float32 variable per feature with units,
formula, reference and parameters in its attrs, stored as Zarr.  Feature functions live one domain per
module (``optical``, ``composite``, ``sar``, ``water``, ``terrain``, ``mrvbf``); ``registry`` names them,
and importing this package registers the built-in ones (``builtin``), so user features registered with
:func:`feature` sit beside them.
"""

from .._lazy import exports
from . import builtin  # noqa: F401  (registers the built-in features)

__all__, __getattr__, __dir__ = exports(__name__, {
    "registry": ["FeatureDef", "Availability", "feature", "resolve_selection", "plan_selection",
                 "default_selection", "load_plugins", "registry_table", "registry_markdown"],
    "plausibility": ["plausibility_checks", "optical_plausibility", "index_range_counts", "ReflectanceWarning"],
    "cube": ["build_cube", "plan_features", "save_cube", "open_cube", "cube_summary", "season_variable", "season_coverage"],
    "composite": ["seasonal_composite", "reflectance_plausibility", "check_reflectance"],
    "optical": ["normalized_difference", "normalized_differences", "optical_indices", "band_medians"],
    "sar": ["to_db", "from_db", "to_linear_power", "temporal_stats", "lee_filter", "temporal_ratio_filter"],
    "water": ["otsu_threshold", "ashman_d", "bimodality", "water_masks", "surface_water_frequency",
              "hydroperiod_class"],
    "terrain": ["fill_depressions", "depression_depth", "flow_accumulation", "specific_catchment_area",
                "topographic_wetness_index", "height_above_nearest_drainage", "depth_to_water",
                "topographic_position_index"],
    "mrvbf": ["mrvbf_slope_threshold", "mrrtf"],
})
