"""Is the run's validation design honest?  Random-pixel CV, spatial CV and the map's accuracy on the demo.

The end-to-end test reuses the session's ``demo_run`` (600 x 600 px demo) and refits the run's model five
times for the random-pixel contrast (about as long as the run's own validation step).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import rasterio
from affine import Affine

from wetlandflow.errors import GridMismatchError, ParameterError, ValidationDesignError
from wetlandflow.validation.honesty import cv_honesty, map_accuracy_against_truth, random_pixel_cv_predictions

# Margins of the honesty test (common practice, no source): random-pixel CV must exceed the map's true
# accuracy by at least 5 points, and the spatial estimate must be at most half as far from the truth.
RANDOM_MARGIN = 0.05
CLOSER_RATIO = 0.5


@pytest.fixture(scope="module")
def honesty(demo_run, tmp_path_factory):
    """The three accuracies of the demo run, also written to a JSON file and printed."""
    truth = demo_run.run_dir.parent.parent / "truth.tif"
    table = cv_honesty(demo_run.run_dir, truth)
    out = tmp_path_factory.mktemp("cv_honesty") / "cv_honesty.json"
    record = {row.estimate: {"overall_accuracy": row.overall_accuracy, "n": int(row.n)}
              for row in table.itertuples()}
    out.write_text(json.dumps(record, indent=2))
    print(f"\n{table.drop(columns='what').to_string(index=False)}\nwritten to {out}")
    return table.set_index("estimate"), out


@pytest.mark.slow
def test_random_pixel_cv_is_optimistic_and_spatial_cv_is_close_to_the_truth(honesty):
    """Random pixel splits leak (Roberts et al. 2017, Ecography 40, 913-929; Ploton et al. 2020, Nature
    Communications 11, 4540): on the demo, with its truth raster, random-pixel CV overall accuracy must be
    clearly above the map's accuracy against the truth, and the spatial design's estimate much closer."""
    table, out = honesty
    oa = table["overall_accuracy"]
    spatial = oa[[i for i in oa.index if i.startswith("spatial CV")]].iloc[0]
    random, truth = oa["random-pixel CV"], oa["map vs truth"]
    assert random > truth + RANDOM_MARGIN
    assert abs(spatial - truth) < abs(random - truth)
    assert abs(spatial - truth) < CLOSER_RATIO * abs(random - truth)
    assert set(json.loads(out.read_text())) == set(table.index)


@pytest.mark.slow
def test_spatial_estimate_is_the_runs_out_of_fold_accuracy(demo_run, honesty):
    """The spatial row is the accuracy of the run's out-of-fold predictions, whose folds keep plots whole."""
    table, _ = honesty
    oof = pd.read_parquet(demo_run.run_dir / "validation" / "oof_predictions.parquet")
    spatial = table.loc[[i for i in table.index if i.startswith("spatial CV")][0]]
    assert spatial["overall_accuracy"] == pytest.approx((oof["predicted"] == oof["class"]).mean(), abs=1e-12)
    assert spatial["n"] == len(oof)
    assert (oof.groupby("plot_id")["fold"].nunique() == 1).all()


# --------------------------------------------------------------------------- the pieces, on small rasters


def write_codes(path, codes, *, x0=500_000.0, y0=6_000_000.0, res=10.0, crs="EPSG:32633"):
    h, w = codes.shape
    with rasterio.open(path, "w", driver="GTiff", width=w, height=h, count=1, dtype="uint8", crs=crs,
                       transform=Affine(res, 0, x0, 0, -res, y0), nodata=0) as ds:
        ds.write(codes.astype("uint8"), 1)
    return path


def test_map_accuracy_counts_every_common_pixel_once(tmp_path):
    """Closed form: 100 pixels with 0 in 4 of them on one side, 7 wrong labels among the rest."""
    truth = np.tile(np.array([1, 2, 3, 1, 2]), (10, 2))
    truth[0, :4] = 0
    class_map = truth.copy()
    class_map[5, :7] = np.where(truth[5, :7] == 3, 1, 3)
    class_map[9, 9] = 0
    r = map_accuracy_against_truth(write_codes(tmp_path / "m.tif", class_map),
                                   write_codes(tmp_path / "t.tif", truth), map_classes=["a", "b", "c"])
    assert r["n_pixels"] == 100 - 4 - 1
    assert r["overall_accuracy"] == pytest.approx(1 - 7 / 95)


def test_truth_on_a_larger_grid_and_in_another_class_order(tmp_path):
    truth = np.zeros((20, 20), dtype=np.uint8)
    truth[5:15, 5:15] = np.tile([2, 1], (10, 5))  # truth codes: 1 = "b", 2 = "a"
    class_map = np.tile([1, 2], (10, 5))  # map codes: 1 = "a", 2 = "b"; the map covers the truth's centre
    m = write_codes(tmp_path / "m.tif", class_map, x0=500_050.0, y0=5_999_950.0)
    t = write_codes(tmp_path / "t.tif", truth)
    r = map_accuracy_against_truth(m, t, map_classes=["a", "b"], truth_classes=["b", "a"])
    assert r == {"overall_accuracy": 1.0, "n_pixels": 100}
    with pytest.raises(ParameterError, match=r"classes \['x'\] are not in the map's scheme"):
        map_accuracy_against_truth(m, t, map_classes=["a", "b"], truth_classes=["x", "a"])


def test_truth_on_another_grid_is_refused(tmp_path):
    m = write_codes(tmp_path / "m.tif", np.ones((4, 4)))
    t = write_codes(tmp_path / "t.tif", np.ones((4, 4)), res=20.0)
    with pytest.raises(GridMismatchError, match="resample the truth onto the map grid"):
        map_accuracy_against_truth(m, t, map_classes=["a"])


@pytest.mark.filterwarnings("ignore:The number of unique classes:UserWarning")
def test_random_pixel_predictions_need_the_opt_in_and_hold_every_sample_out():
    from sklearn.neighbors import KNeighborsClassifier

    X = np.arange(30, dtype=float)[:, None]
    y = np.array([f"c{i}" for i in range(30)])  # every label once: a held-out row cannot get its own label
    with pytest.raises(ValidationDesignError, match="allow_random_pixels=True"):
        random_pixel_cv_predictions(KNeighborsClassifier(1), X, y)
    pred = random_pixel_cv_predictions(KNeighborsClassifier(1), X, y, n_splits=5, allow_random_pixels=True)
    assert set(pred) <= set(y) and (pred != y).all()
    again = random_pixel_cv_predictions(KNeighborsClassifier(1), X, y, n_splits=5, allow_random_pixels=True)
    np.testing.assert_array_equal(pred, again)
