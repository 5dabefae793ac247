"""Stage 5b, accuracy: error matrices, the validation sample design and error-adjusted areas.

Takes a class map and reference labels and returns accuracy measures with standard errors and the
stratified estimates of class areas with confidence intervals (``estimators``, after Olofsson et al. 2014);
designs the stratified random validation sample and reads it back once labelled (``sampling``); and runs
both on a run folder (``assessment``).
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "estimators": ["Estimate", "AreaAccuracyResult", "error_matrix", "accuracy_measures", "disagreement",
                   "collapse_matrix", "stratified_estimates", "simple_random_estimates", "plot_error_matrix",
                   "plot_areas", "write_area_table", "proportion_interval"],
    "sampling": ["sample_size_overall", "allocate", "mapped_proportions", "draw_stratified_sample",
                 "write_sample", "read_labelled_sample", "estimates_from_sample", "expected_overall_se",
                 "write_map_classes", "read_map_classes"],
    "assessment": ["final_class_map", "class_codes", "design_sample", "assess", "label_from_reference",
                   "coverage_study", "sample_design_record", "areas_table", "mapped_areas", "AREAS_COLUMNS",
                   "plan_sample", "SamplePlan"],
})
