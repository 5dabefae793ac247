"""Stage 5c, explanations: SHAP values of a fitted model, their summaries, maps and figures.

Takes a fitted model (flat or hierarchical) and feature rows or a window of the cube, and returns SHAP
values with class labels, importance per class, data domain and correlation cluster, the stability of the
ranking over plot bootstraps, and per-pixel contribution maps (``attribution``); ``plots`` draws them.
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "attribution": ["shap_values", "model_levels", "combined_shap_values", "hierarchical_shap_values",
                    "model_shap_values", "explain_budget", "shap_interactions", "stratified_subsample",
                    "global_importance", "domain_importance", "cluster_importance", "ranking_stability",
                    "window_contributions", "contribution_map", "shap_map", "write_shap_map"],
    "plots": ["plot_importance", "plot_beeswarm", "plot_dependence", "plot_domain_importance",
              "plot_waterfall"],
})
