"""Stage 5d, monitoring: are the wetlands changing, and did a project change them?

Works on dated series on the run's grid (or a coarser archive grid): per-date surface-water maps from
SAR or optical scenes and their frequency and hydroperiod (``water_series``); long-term trends per pixel
and per polygon with false-discovery control (``trends``); change points (``changepoint``);
before/after-control-impact comparisons (``baci``); and recovery of disturbed patches (``recovery``).
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "zonal": ["zone_ids", "zonal_series", "annual_table", "in_window"],
    "changepoint": ["pettitt"],
    "baci_analysis": ["BaciResult", "baci", "baci_table", "baci_figure"],
    "recovery": ["recovery_metrics", "detect_disturbance", "recovery_table", "recovery_figure"],
    "trends": ["mann_kendall", "false_discovery", "annual_values", "polygon_trends", "trend_series_figure",
               "trend_map_figure"],
    "water_threshold": ["split_threshold"],
    "water_series": ["sar_water", "optical_water", "water_frequency", "hydroperiod_days"],
    "water_area": ["water_area_series"],
    "water_store": ["DatedInput", "UpdateReport", "WaterSeriesStore"],
    "water_figures": ["water_area_figure", "water_frequency_figure"],
})
