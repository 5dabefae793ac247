"""Stage 4a, validation designs: scikit-learn splitters that keep validation spatially honest.

Takes sample coordinates and plot ids and returns train/test index pairs through scikit-learn's splitter
protocol: spatial blocks (``splitters``), buffered leave-out, NNDM and kNNDM distance matching (``nndm``),
the block size from the variogram's range (``variogram``), nested tuning on spatial folds (``nested``), and
the comparison of random-pixel, spatial and truth-based accuracy (``honesty``).
"""

from .._lazy import exports

__all__, __getattr__, __dir__ = exports(__name__, {
    "splitters": ["FewPlotsWarning", "block_ids", "SpatialBlockKFold", "assign_folds", "check_splits",
                  "check_folds", "fold_class_counts", "BufferedSplitter", "random_pixel_kfold"],
    "nndm": ["nn_distances", "wasserstein_w", "NNDMResult", "nndm_train_sets", "NNDM", "KNNDMResult",
             "knndm_folds", "KNNDM", "cv_distance_diagnostics", "plot_distance_ecdf", "plot_folds"],
    "variogram": ["BlockSizeSuggestion", "suggest_block_size"],
    "nested": ["subset_splitter", "NestedCVResult", "spatial_grid_search", "spatial_early_stopping"],
    "honesty": ["random_pixel_cv_predictions", "map_accuracy_against_truth", "map_error_matrix_against_truth",
                "cv_honesty"],
})
