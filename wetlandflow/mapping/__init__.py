"""Stage 5a, mapping: wall-to-wall prediction, the area of applicability and the polygon inventory.

Takes a fitted model and the feature cube and returns Cloud-Optimized GeoTIFFs on the grid: per-class
probabilities, the class map and confidence layers, predicted window by window (``predict``); the
dissimilarity index and area of applicability (``applicability``); and the class map after the minimum
mapping unit with its polygons and areas (``inventory``).
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "predict": ["windows", "confidence_layers", "window_memory_bytes", "predict_map", "build_cog",
                "code_counts", "class_areas"],
    "applicability": ["ApplicabilityModel", "fit_applicability", "aoa_threshold", "dissimilarity_index",
                      "applicability_map", "inside_flag", "share_outside", "nearest_search",
                      "effective_dimensions", "mean_pairwise_distance", "xgb_importance_weights"],
    "inventory": ["label_patches", "apply_mmu", "polygonize", "area_summary", "write_inventory"],
})
