"""Stage 1, inputs: the project file, the reference grid, and the user's rasters and vectors aligned onto it.

Takes a project file (TOML) and returns a validated, frozen :class:`Project`, the run's :class:`Grid`, and a
:class:`FeatureInputs` holding every layer (optical reflectance, SAR backscatter, DEM, AOI mask) read lazily
onto that grid, scaled and masked.  Also the atomic writers every later stage uses (``io``), the seasons
(``seasons``), the sensor descriptions (``sensors``) and scene layouts (``scenes``), the SAR unit check (``sar_units``) and the run's preflight checks of disk and memory
(``preflight``).
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "project": ["Project", "load_project", "parse_project", "config_hash", "to_dict", "portable_dict",
                "scene_files", "DEFAULT_SEASONS", "as_mapped", "without_classes", "dropped_class_note"],
    "sensors": ["Sensor", "SENSORS", "BAND_NAMES", "sensor_table"],
    "scenes": ["expand_scene_tables", "sensor_of"],
    "grid": ["Grid", "attach", "require_match", "require_projected"],
    "align": ["RasterInfo", "inspect_raster", "read_aligned", "check_overlap", "aoi_mask",
              "choose_resampling"],
    "io": ["atomic_path", "write_json", "write_table", "write_vector", "read_vector", "sha256_file",
           "fingerprint", "disk_full_error", "check_file_size_limit"],
    "layers": ["FeatureInputs", "InputCoverageWarning", "read_aoi", "project_grid", "grid_reference",
               "load_optical", "load_sar", "load_dem", "load_inputs", "input_inventory"],
    "seasons": ["season_mask"],
    "sar_units": ["check_sar_units"],
    "preflight": ["estimate_output_bytes", "estimate_memory_bytes", "check_disk", "check_memory"],
})
