"""L2 logistic regression with its penalty chosen by blocked inner cross-validation.

A light replacement for ``GridSearchCV(make_pipeline(StandardScaler(), LogisticRegression()))``
for the bout decoders: the same model and the same nested choice, but the inner fits walk the
penalty path with warm starts and skip the grid-search machinery. Measured on the small demo's
bout decoder (187 cells, ~140 bouts, 7 lags x 21 label sets x 5 folds): the grid-search version
spent most of its 250 s in per-fit overhead (cloning, joblib dispatch, scorer calls).

With more cells than bouts (the usual case: 1,000-100,000 cells, a few hundred to a few
thousand bouts) the fits run in the row space of the training data: the L2-penalised weights
of a logistic model always lie in the span of the (centred) training rows, so fitting on the
coordinates ``U S`` of the thin decomposition ``Z = U S V^T`` gives exactly the same model
(the representer theorem; Hastie, Tibshirani & Friedman 2009, section 18.3.5) with
``n_samples`` instead of ``n_features`` columns, and no features x features matrix is formed.
"""

from __future__ import annotations

import numpy as np
from scipy.special import expit
from sklearn.base import BaseEstimator, ClassifierMixin
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import roc_auc_score
from sklearn.utils.multiclass import unique_labels
from sklearn.utils.validation import check_is_fitted, validate_data
from threadpoolctl import threadpool_limits

from pipeline.analysis.cv import BlockedKFold

__all__ = ["NestedLogistic"]


class NestedLogistic(ClassifierMixin, BaseEstimator):
    """Binary L2 logistic regression; ``C`` chosen by ROC AUC over blocked inner folds.

    Parameters
    ----------
    Cs : tuple of float, default=(1e-3, 1e-2, 1e-1, 1.0)
        Inverse penalties tried, weakest penalty last (the path is walked with warm starts).
    cv : int, default=3
        Contiguous inner folds of the training samples.
    gap : int, default=0
        Samples left out of inner training on each side of an inner test block.
    tol : float, default=1e-3
    max_iter : int, default=500

    Attributes
    ----------
    classes_ : ndarray of shape (2,)
    C_ : float
        The chosen inverse penalty.
    mean_, scale_ : ndarray of shape (n_features,)
        Standardisation learned from the training data (inside the outer fold only).
    coef_ : ndarray of shape (1, n_features)
        Weights of the final model on the standardised features.
    intercept_ : ndarray of shape (1,)
    n_iter_ : ndarray
        Solver iterations of the final fit.

    References
    ----------
    Cox DR (1958). The regression analysis of binary sequences. J R Stat Soc B 20:215-242.
    Hastie T, Tibshirani R, Friedman J (2009). The Elements of Statistical Learning, 2nd ed.,
    section 18.3.5 (computational shortcuts when p >> N: fitting in the row space).
    """

    def __init__(self, Cs=(1e-3, 1e-2, 1e-1, 1.0), cv=3, gap=0, tol=1e-3, max_iter=500):
        self.Cs = Cs
        self.cv = cv
        self.gap = gap
        self.tol = tol
        self.max_iter = max_iter

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.classifier_tags.multi_class = False
        return tags

    def _model(self, C: float) -> LogisticRegression:
        return LogisticRegression(C=C, tol=self.tol, max_iter=self.max_iter, warm_start=True)

    def fit(self, X, y):
        X, y = validate_data(self, X, y)
        self.classes_ = unique_labels(y)
        if self.classes_.size != 2:
            raise ValueError("Only binary classification is supported. "
                             f"Got {self.classes_.size} classes instead.")
        self.mean_ = X.mean(axis=0)
        scale = X.std(axis=0)
        self.scale_ = np.where(scale > 0, scale, 1.0)
        Z = (X - self.mean_) / self.scale_
        basis = _row_space(Z)
        W = Z if basis is None else basis[0]
        Cs = sorted(float(c) for c in self.Cs)
        score = np.zeros(len(Cs))
        n_inner = min(self.cv, max(2, y.size // 4))
        # the solver works on small arrays: BLAS and OpenMP threads only add synchronisation (4x the
        # CPU time of one thread for 100 bouts x 196 cells, on two cores)
        with threadpool_limits(limits=1):
            for tr, te in BlockedKFold(n_inner, gap=self.gap).split(W):
                if np.unique(y[tr]).size < 2 or np.unique(y[te]).size < 2:
                    continue
                model = self._model(Cs[0])
                for i, C in enumerate(Cs):
                    model.set_params(C=C)
                    model.fit(W[tr], y[tr])
                    score[i] += roc_auc_score(y[te] == self.classes_[1],
                                              model.decision_function(W[te]))
            self.C_ = Cs[int(np.argmax(score))]
            final = self._model(self.C_).fit(W, y)
        coef = final.coef_ if basis is None else (Z.T @ (basis[1] @ final.coef_.T)).T
        self.coef_ = np.asarray(coef, dtype=np.float64)
        self.intercept_ = final.intercept_
        self.n_iter_ = final.n_iter_
        return self

    def decision_function(self, X):
        check_is_fitted(self)
        X = validate_data(self, X, reset=False)
        return ((X - self.mean_) / self.scale_) @ self.coef_[0] + self.intercept_[0]

    def predict_proba(self, X):
        p = expit(self.decision_function(X))
        return np.column_stack([1.0 - p, p])

    def predict(self, X):
        check_is_fitted(self)
        return self.classes_[(self.decision_function(X) > 0).astype(int)]


def _row_space(Z):
    """Coordinates ``U S`` of the centred rows of ``Z`` in their own span, and the map back.

    Returns None when there are no more features than samples (nothing to gain). Otherwise
    ``(W, M)`` with ``W = U S`` of shape (n_samples, rank) and ``M = U S^-1`` so that weights
    ``a`` on ``W`` are the weights ``Z^T M a`` on ``Z``: ``Z (Z^T M a) = U S^2 U^T U S^-1 a
    = W a``. Only the samples x samples Gram matrix is formed.
    """
    n, p = Z.shape
    if p <= n:
        return None
    s2, U = np.linalg.eigh(Z @ Z.T)
    keep = s2 > max(float(s2.max(initial=0.0)), 0.0) * n * np.finfo(np.float64).eps
    s = np.sqrt(s2[keep])
    U = U[:, keep]
    return U * s, U / s
