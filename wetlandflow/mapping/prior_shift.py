"""The class priors of the area mapped, estimated from a pixel sample, and the model adjusted to them.

:func:`area_priors` draws a simple random sample of the valid pixels of the cube (seeded), predicts them,
and runs the EM of Saerens, Latinne & Decaestecker (2002) (:func:`wetlandflow.models.priors.em_priors`)
from the priors the model was fitted under; or takes the shares a user gives (for example a previous
inventory's).  :func:`adjusted_model` wraps the fitted model so that every window of the map is predicted
under those priors.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import xarray as xr

from ..inputs.project import given_shares
from ..models.classifier import scheme_proba
from ..models.priors import PriorAdjustedClassifier, PriorEstimate, em_priors

__all__ = ["area_priors", "adjusted_model", "given_priors", "sample_valid_pixels"]


def sample_valid_pixels(cube: xr.Dataset, features: list[str], valid: xr.DataArray, n: int,
                        seed: int) -> np.ndarray:
    """Feature rows of up to ``n`` pixels drawn without replacement from the valid pixels (float32).

    Pixels are read window by window of the cube's chunks (pointwise indexing), never the whole cube.
    """
    mask = np.asarray(valid.values, dtype=bool)
    flat = np.flatnonzero(mask.ravel())
    if flat.size == 0:
        return np.empty((0, len(features)), np.float32)
    rng = np.random.default_rng(seed)
    pick = np.sort(rng.choice(flat, size=min(n, flat.size), replace=False))
    rows, cols = np.unravel_index(pick, mask.shape)
    iy = xr.DataArray(rows, dims="pixel")
    ix = xr.DataArray(cols, dims="pixel")
    data = cube[features].isel(y=iy, x=ix).to_dataarray("feature").transpose("pixel", "feature")
    return np.asarray(data.values, dtype=np.float32)


def given_priors(shares: Mapping[str, float], classes: tuple[str, ...]) -> np.ndarray:
    """User-given class shares (``[priors] shares``) in scheme order, checked and normalised."""
    return np.asarray(given_shares(dict(shares), tuple(classes)), dtype=np.float64)


def area_priors(model: Any, cube: xr.Dataset, features: list[str], valid: xr.DataArray,
                train_priors: np.ndarray, *, n_pixels: int, seed: int,
                classes: tuple[str, ...]) -> PriorEstimate:
    """EM estimate of the class priors of the valid pixels (a random sample of ``n_pixels``)."""
    X = sample_valid_pixels(cube, features, valid, n_pixels, seed)
    return em_priors(scheme_proba(model, X), train_priors, classes=classes)


def adjusted_model(model: Any, train_priors: np.ndarray, priors: np.ndarray) -> PriorAdjustedClassifier:
    """``model`` predicting under ``priors`` instead of the priors it was fitted under."""
    return PriorAdjustedClassifier(model, np.asarray(train_priors, float), np.asarray(priors, float))
