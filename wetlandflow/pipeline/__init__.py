"""Stage 7, pipeline: a run, composed from every stage below it.

Takes a project file and returns a run folder: the steps inputs, features, samples, validation, model,
mapping, inventory and explain (``run``), each cached by its inputs and recorded in ``manifest.json``
(``manifest``), reused only when its outputs check out (``manifest``, ``checks``); the monitoring of an
image archive into the run folder's ``monitor/`` (``monitor``); the later steps'
compositions of library functions in ``steps``; the run folder's lock (one writer at a time) in ``lock``.
Nothing below imports this package.
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "run": ["RunResult", "run_project", "make_model", "make_splitter", "training_weights",
            "cross_validate", "feature_names", "format_summary"],
    "check": ["CheckReport", "check_project"],
    "monitor": ["MonitorResult", "monitor_project", "archive_project", "monitor_polygons", "check_metrics",
                "dated_metrics", "write_bands_cog", "format_monitor_summary"],
    "steps": ["applicability_model", "write_inventory_outputs", "write_explanations", "top_drivers"],
    "lock": ["run_folder_lock", "read_lock", "LockHolder", "LOCK_NAME"],
    "manifest": ["Manifest", "step_key"],
    "checks": ["check_class_map_complete", "check_layer_complete", "bundle_mismatch", "areas_mismatch"],
})
