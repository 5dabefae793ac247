"""Stage 4b, models: classifiers with a class scheme, their bundles, and the tools to choose between them.

Takes the samples table (features, classes, weights, folds) and returns a fitted scikit-learn classifier:
:class:`WetlandClassifier` over XGBoost or a random forest (``classifier``), or a two-level
:class:`HierarchicalClassifier` (``hierarchy``), saved and loaded as a model bundle (``bundle``).  Beside
them: probability calibration (``calibration``), feature selection under spatial CV (``selection``) and the
side-by-side comparison of designs (``compare``).  The hierarchy builds on the flat classifier, never the
reverse; ``bundle`` knows both, and the pipeline's ``make_model`` chooses between them.
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "classifier": ["ClassScheme", "WetlandClassifier", "canonical_order", "check_no_sentinels", "data_hash",
                   "openmp_threads", "FeatureAlignmentWarning", "FeatureCheck", "check_features",
                   "align_features", "scheme_proba", "NotFittedModelError"],
    "hierarchy": ["HierarchicalClassifier"],
    "bundle": ["save_bundle", "load_bundle"],
    "calibration": ["reliability_table", "brier_score", "expected_calibration_error", "plot_reliability",
                    "plot_reliability_comparison", "ProbabilityCalibrator", "CalibratedWetlandClassifier"],
    "selection": ["SelectionResult", "forward_feature_selection", "forward_selection_within_folds",
                  "importance_ranking", "recursive_elimination", "write_selection", "write_selected_features",
                  "read_selected_features"],
    "compare": ["ComparisonResult", "compare_models", "write_comparison", "load_run_inputs", "compare_run"],
})
