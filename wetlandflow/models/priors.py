"""Class priors of the area mapped: estimate them without labels and adjust the probabilities to them.

Field and photo-interpreted plots are placed to cover every class, and the classifier is usually fitted
with balanced class weights: its probabilities then carry the *training* priors, not the landscape's.
A rare class (bog on the demo) is mapped far more often than it occurs.  Saerens, Latinne & Decaestecker
(2002) show that when only the priors differ between the training data and the area mapped (the class-
conditional densities are the same), the posterior under new priors is

    p'(k | x) = [pi'_k / pi_k * p(k | x)] / sum_j [pi'_j / pi_j * p(j | x)]

and that the new priors pi' maximising the likelihood of the unlabelled pixels are found by EM: the
E-step is the formula above with the current pi', the M-step sets pi' to the mean adjusted posterior over
the pixels.  Both steps are two lines of numpy; scikit-learn has no estimator for it, and the
quantification library that implements it (quapy) is a test reference here, not a run-time dependency.

References
----------
Saerens, M., Latinne, P., Decaestecker, C. (2002). Adjusting the outputs of a classifier to new a priori
probabilities: a simple procedure. Neural Computation 14(1), 21-41. doi:10.1162/089976602753284446
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from sklearn.base import BaseEstimator, ClassifierMixin

from ..errors import ModelError, ParameterError

__all__ = ["PriorAdjustedClassifier", "PriorEstimate", "adjust_to_priors", "em_priors", "training_priors"]

SOURCE = ("Saerens, Latinne & Decaestecker (2002), Adjusting the outputs of a classifier to new a priori "
          "probabilities: a simple procedure, Neural Computation 14(1), 21-41, doi:10.1162/089976602753284446")


def _as_priors(priors: Any, k: int, what: str) -> np.ndarray:
    p = np.asarray(priors, dtype=np.float64).ravel()
    if p.size != k or not np.all(np.isfinite(p)) or np.any(p < 0) or p.sum() <= 0:
        raise ParameterError(f"{what} must be {k} non-negative shares (one per class), got {priors!r}")
    return p / p.sum()


def adjust_to_priors(proba: Any, train_priors: Any, new_priors: Any) -> np.ndarray:
    """Posterior probabilities re-weighted from the training priors to new priors (Saerens et al. 2002, eq. 2.4).

    Parameters
    ----------
    proba : array (n, k)
        Probabilities from a classifier fitted under ``train_priors``; rows sum to 1.
    train_priors, new_priors : array (k,)
        Class shares; normalised here.  A class with training prior 0 keeps probability 0.

    Returns
    -------
    numpy.ndarray (n, k), float64, rows summing to 1 (rows that were all zero stay zero).
    """
    p = np.asarray(proba, dtype=np.float64)
    k = p.shape[1]
    ratio = np.divide(_as_priors(new_priors, k, "new priors"), _as_priors(train_priors, k, "training priors"),
                      out=np.zeros(k), where=np.asarray(train_priors, dtype=np.float64) > 0)
    q = p * ratio
    s = q.sum(axis=1, keepdims=True)
    return np.divide(q, s, out=np.zeros_like(q), where=s > 0)


@dataclass
class PriorEstimate:
    """The outcome of :func:`em_priors`."""

    classes: list[str]
    training: np.ndarray
    estimated: np.ndarray
    n_iter: int
    converged: bool
    n_pixels: int
    log_likelihood_ratio: float = 0.0
    source: str = field(default=SOURCE)

    def table(self) -> pd.DataFrame:
        """One row per class: training prior, estimated prior, ratio; shares in [0, 1]."""
        return pd.DataFrame({"class": self.classes, "training_prior": self.training,
                             "estimated_prior": self.estimated,
                             "ratio": np.divide(self.estimated, self.training, out=np.full(len(self.classes),
                                                np.nan), where=self.training > 0)})

    def to_dict(self) -> dict[str, Any]:
        return {"method": "EM (Saerens et al. 2002)", "n_pixels": self.n_pixels, "n_iter": self.n_iter,
                "converged": self.converged, "log_likelihood_ratio": round(self.log_likelihood_ratio, 3),
                "priors": {c: {"training": round(float(t), 6), "estimated": round(float(e), 6)}
                           for c, t, e in zip(self.classes, self.training, self.estimated, strict=True)},
                "source": self.source}


def em_priors(proba: Any, train_priors: Any, *, classes: Any = None, tol: float = 1e-8,
              max_iter: int = 10_000) -> PriorEstimate:
    """Estimate the class priors of unlabelled data by EM (Saerens, Latinne & Decaestecker 2002, section 2.2).

    Parameters
    ----------
    proba : array (n, k)
        The classifier's probabilities on a sample of the pixels to be mapped (NaN rows are ignored).
    train_priors : array (k,)
        The class shares the classifier was fitted under (with its sample weights: see
        :func:`training_priors`).
    tol : float
        Stop when no prior moves by more than ``tol`` in one iteration.

    Returns
    -------
    PriorEstimate
        ``estimated`` sums to 1; ``log_likelihood_ratio`` is the statistic of the paper's likelihood-ratio
        test (section 3: twice the log-likelihood gain of the new priors over the training priors,
        asymptotically chi-squared with k - 1 degrees of freedom under "priors unchanged").
    """
    p = np.asarray(proba, dtype=np.float64)
    if p.ndim != 2:
        raise ParameterError(f"proba must be (n_pixels, n_classes), got shape {p.shape}")
    p = p[np.all(np.isfinite(p), axis=1)]
    k = p.shape[1]
    if p.shape[0] == 0:
        raise ModelError("no pixel with finite probabilities to estimate the class priors from")
    pt = _as_priors(train_priors, k, "training priors")
    live = pt > 0
    ratio = np.zeros(k)
    ratio[live] = 1.0 / pt[live]
    base = p * ratio  # p(k|x) / pi_k: the E-step multiplies this by the current priors
    pi, converged, it = pt.copy(), False, 0
    for it in range(1, max_iter + 1):
        q = base * pi
        q /= np.maximum(q.sum(axis=1, keepdims=True), np.finfo(float).tiny)
        new = q.mean(axis=0)
        step = float(np.max(np.abs(new - pi)))
        pi = new
        if step < tol:
            converged = True
            break
    # likelihood ratio of the data under pi against pi_train: sum_i log sum_k pi_k/pi_t,k p(k|x_i)
    llr = 2.0 * float(np.sum(np.log(np.maximum((base * pi).sum(axis=1), np.finfo(float).tiny))))
    names = [str(c) for c in (classes if classes is not None else range(k))]
    return PriorEstimate(names, pt, pi, it, converged, p.shape[0], llr)


def training_priors(y: Any, classes: Any, sample_weight: Any = None, *, balanced: bool = False) -> np.ndarray:
    """The class shares a classifier was fitted under, in the order of ``classes``.

    ``balanced=True`` when the classifier balances classes itself (every class present gets the same total
    weight); otherwise the (weighted) label shares.  Classes absent from ``y`` get 0.
    """
    y = np.asarray(y).astype(str)
    names = [str(c) for c in classes]
    w = np.ones(y.size) if sample_weight is None else np.asarray(sample_weight, dtype=np.float64)
    tot = np.array([w[y == c].sum() for c in names])
    if balanced:
        tot = (tot > 0).astype(np.float64)
    if tot.sum() <= 0:
        raise ModelError("no training sample carries any weight: the training priors are undefined")
    return tot / tot.sum()


class PriorAdjustedClassifier(ClassifierMixin, BaseEstimator):
    """A fitted classifier whose probabilities are re-weighted to new class priors (Saerens et al. 2002).

    Wraps a fitted wetlandflow classifier (it needs ``predict_scheme_proba`` and ``scheme_``); the
    wrapper is not refitted: ``fit`` refuses, since the priors belong to the area mapped, not the data.

    Parameters
    ----------
    base : fitted classifier
    train_priors, priors : array (k,), in the base model's scheme order.
    """

    def __init__(self, base: Any = None, train_priors: Any = None, priors: Any = None):
        self.base = base
        self.train_priors = train_priors
        self.priors = priors

    def fit(self, X: Any, y: Any, **kw: Any) -> PriorAdjustedClassifier:
        raise ModelError("a prior-adjusted classifier is not refitted: fit the base model, then wrap it")

    def __sklearn_is_fitted__(self) -> bool:
        return hasattr(self.base, "scheme_")

    @property
    def scheme_(self) -> np.ndarray:
        return self.base.scheme_

    @property
    def classes_(self) -> np.ndarray:
        return self.base.classes_

    def predict_scheme_proba(self, X: Any) -> np.ndarray:
        """Adjusted probabilities, columns in scheme order."""
        return adjust_to_priors(self.base.predict_scheme_proba(X), self.train_priors, self.priors)

    def predict_proba(self, X: Any) -> np.ndarray:
        """Adjusted probabilities, columns in ``classes_`` (sorted) order."""
        p = self.predict_scheme_proba(X)
        order = [list(self.scheme_).index(c) for c in self.classes_]
        return p[:, order]

    def predict(self, X: Any) -> np.ndarray:
        return np.asarray(self.scheme_)[np.argmax(self.predict_scheme_proba(X), axis=1)]
