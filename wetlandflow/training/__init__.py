"""Stage 3, training data: samples from the labelled plots, their weights, and exploration before modelling.

Takes the plots (polygons or points with a class label) and the feature cube, and returns the samples table
(one row per pixel: ``plot_id``, ``class``, ``x``, ``y``, features; ``samples``), per-sample weights that
balance classes and cap any one plot's share (``weights``), and the class separability and predictor
redundancy tables an analyst reads before choosing predictors (``explore``).
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "samples": ["read_plots", "check_training_features", "plot_pixels", "extract_samples", "missing_report",
                "class_balance", "drop_incomplete"],
    "weights": ["PlotCapWarning", "sample_weights", "weighted_priors", "adjust_priors", "weight_summary"],
    "explore": ["class_separability", "separability_by_feature", "separability_summary", "hard_pairs",
                "jeffries_matusita_gaussian", "transformed_divergence_gaussian", "bhattacharyya_gaussian",
                "m_statistic", "predictor_correlation", "RedundancyResult", "redundant_predictors",
                "plot_separability", "plot_class_distributions", "plot_correlation"],
})
