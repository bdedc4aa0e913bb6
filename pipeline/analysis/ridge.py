"""Ridge regression for every penalty and every target at once, from one eigendecomposition.

With the training features standardised (``Xs``), ridge predictions for penalty ``a`` are
``Z_test diag(1 / (s^2 + a)) A`` where ``s^2`` are the eigenvalues of the smaller of the two
Gram matrices: the primal ``Xs^T Xs`` (cells x cells, used when there are fewer cells than
samples) or the dual kernel ``Xs Xs^T`` (samples x samples, used when cells outnumber samples,
so a cells x cells matrix is never formed). ``A`` projects all targets at once, so a whole
grid of penalties, lags and null targets costs one decomposition plus one GEMM per penalty.
Truncating the spectrum to the top ``k`` components is exactly ridge on ``k`` principal
components fitted inside the same training set.

The Gram matrices are accumulated in blocks of cells in float64, so features stored as float32
(100k cells) never need a float64 copy of the whole matrix.
"""

from __future__ import annotations

import numpy as np
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.utils.validation import check_is_fitted, validate_data

from pipeline.errors import ConfigError, InputError

__all__ = ["RidgeBasis", "RidgePathCV", "r2_columns", "pearson_columns"]

_BLOCK_CELLS = 4096


def r2_columns(y_true, y_pred):
    """Coefficient of determination per column, as ``sklearn.metrics.r2_score`` computes it.

    A constant column scores 1.0 when predicted exactly and 0.0 otherwise (scikit-learn's
    ``force_finite`` rule).
    """
    y_true = np.asarray(y_true, dtype=np.float64)
    ss_res = np.sum((y_true - y_pred) ** 2, axis=0)
    ss_tot = np.sum((y_true - y_true.mean(axis=0)) ** 2, axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        r2 = 1.0 - ss_res / ss_tot
    return np.where(ss_tot > 0, r2, np.where(ss_res > 0, 0.0, 1.0))


def pearson_columns(y_true, y_pred):
    """Pearson correlation per column (0 where either column is constant)."""
    a = np.asarray(y_true, dtype=np.float64)
    b = np.asarray(y_pred, dtype=np.float64)
    a = a - a.mean(axis=0)
    b = b - b.mean(axis=0)
    den = np.sqrt(np.sum(a * a, axis=0) * np.sum(b * b, axis=0))
    with np.errstate(invalid="ignore", divide="ignore"):
        r = np.sum(a * b, axis=0) / den
    return np.where(den > 0, r, 0.0)


class RidgeBasis:
    """Eigendecomposition of one training set's standardised features.

    Parameters
    ----------
    X : ndarray of shape (n_samples, n_cells)
        All features (any float dtype; read in blocks of cells).
    train : ndarray of int
        Training rows.
    standardize : bool, default=True
        Centre and scale each cell by its training mean and standard deviation (otherwise only
        centre, which is what ``sklearn.linear_model.Ridge(fit_intercept=True)`` does).
    n_components : int, default=0
        Keep only the top components (ridge on principal components); 0 keeps all.

    References
    ----------
    Hoerl AE, Kennard RW (1970). Ridge regression: biased estimation for nonorthogonal
    problems. Technometrics 12:55-67. doi:10.1080/00401706.1970.10488634
    Hastie T, Tibshirani R, Friedman J (2009). The Elements of Statistical Learning, 2nd ed.,
    section 3.4.1 (ridge through the singular value decomposition).
    """

    def __init__(self, X, train, *, standardize=True, n_components=0):
        self.X = X
        self.train = np.asarray(train)
        n_train, n_cells = self.train.size, X.shape[1]
        self.dual = n_cells > n_train
        self.mean = np.empty(n_cells)
        self.scale = np.ones(n_cells)
        for sl in _blocks(n_cells):
            xb = np.asarray(X[self.train, sl], dtype=np.float64)
            self.mean[sl] = xb.mean(axis=0)
            if standardize:
                sd = xb.std(axis=0)
                self.scale[sl] = np.where(sd > 0, sd, 1.0)
        size = n_train if self.dual else n_cells
        if self.dual:
            gram = np.zeros((size, size))
            for sl in _blocks(n_cells):
                xb = self._std(self.train, sl)
                gram += xb @ xb.T
        else:                       # fewer cells than samples: the whole block is small
            xs = self._std(self.train, slice(None))
            gram = xs.T @ xs
        s2, vec = np.linalg.eigh(gram)
        s2 = np.clip(s2, 0.0, None)
        keep = s2 > s2.max(initial=0.0) * size * np.finfo(np.float64).eps
        if n_components:
            keep &= np.arange(size) >= size - int(n_components)
        self.s2 = s2[keep]
        self.vec = vec[:, keep]

    def _std(self, rows, sl):
        return (np.asarray(self.X[rows, sl], dtype=np.float64) - self.mean[sl]) / self.scale[sl]

    def project_targets(self, Y):
        """``A``: the training targets (centred) in the eigenbasis, shape (k, n_targets)."""
        Yc = Y - Y.mean(axis=0)
        if self.dual:
            return self.vec.T @ Yc
        xty = np.zeros((self.X.shape[1], Yc.shape[1]))
        for sl in _blocks(self.X.shape[1]):
            xty[sl] = self._std(self.train, sl).T @ Yc
        return self.vec.T @ xty

    def project_rows(self, rows):
        """``Z``: rows of ``X`` mapped so that predictions are ``Z diag(1/(s2+a)) A``."""
        rows = np.asarray(rows)
        z = np.zeros((rows.size, self.vec.shape[1]))
        for sl in _blocks(self.X.shape[1]):
            xb = self._std(rows, sl)
            if self.dual:
                z += (xb @ self._std(self.train, sl).T) @ self.vec
            else:
                z += xb @ self.vec[sl]
        return z

    def coef(self, A_scaled):
        """Coefficients in original units for scaled projections ``diag(1/(s2+a)) A``."""
        if self.dual:
            u = self.vec @ A_scaled
            out = np.zeros((self.X.shape[1], A_scaled.shape[1]))
            for sl in _blocks(self.X.shape[1]):
                out[sl] = self._std(self.train, sl).T @ u
        else:
            out = self.vec @ A_scaled
        return out / self.scale[:, None]


def activation_pattern(X, rows, weights):
    """Forward-model (activation) pattern of a linear decoder: ``cov(x_i, y_hat) / var(y_hat)``.

    A decoder's weights are not a map of where the decoded signal lives: a cell can get a
    large weight for cancelling noise it shares with informative cells, and the weight of an
    informative cell can take either sign. The activation pattern is each cell's covariance
    with the decoder's output, scaled by the output's variance; it is what the data say each
    cell does when the decoded quantity changes. Computed block by block over cells, never
    forming a cells x cells matrix.

    Parameters
    ----------
    X : array-like of shape (n_samples, n_cells)
        Activity (NumPy or zarr; read in blocks of cells).
    rows : ndarray of int
        The samples the decoder was fitted on.
    weights : ndarray of shape (n_cells,)
        Decoder weights in the original units of ``X``.

    Returns
    -------
    ndarray of shape (n_cells,)
        Activity units per decoded unit; zeros when the output is constant.

    References
    ----------
    Haufe S, Meinecke F, Goergen K, Daehne S, Haynes J-D, Blankertz B, Biessmann F (2014). On
    the interpretation of weight vectors of linear models in multivariate neuroimaging.
    NeuroImage 87:96-110. doi:10.1016/j.neuroimage.2013.10.067 (eq. 6, one decoded target).
    """
    rows = np.asarray(rows)
    weights = np.asarray(weights, dtype=np.float64)
    n_cells = X.shape[1]
    blocks = _blocks(n_cells)
    y_hat = np.zeros(rows.size)
    for sl in blocks:
        y_hat += np.asarray(X[rows, sl], dtype=np.float64) @ weights[sl]
    y_hat -= y_hat.mean()
    var = float(y_hat @ y_hat)
    out = np.zeros(n_cells)
    if var <= 0:
        return out
    for sl in blocks:
        xb = np.asarray(X[rows, sl], dtype=np.float64)
        out[sl] = (xb - xb.mean(axis=0)).T @ y_hat / var
    return out


def _blocks(n, size=_BLOCK_CELLS):
    return [slice(a, min(a + size, n)) for a in range(0, n, size)]


def path_scores(X, Y, train, test, *, alphas, standardize=True, n_components=0, pearson=True):
    """R^2 and Pearson r on the test rows for every penalty and target column.

    Returns
    -------
    r2, r : ndarray of shape (n_alphas, n_targets)
        ``r`` is None when ``pearson=False`` (penalty selection needs only R^2).
    """
    basis = RidgeBasis(X, train, standardize=standardize, n_components=n_components)
    a_proj = basis.project_targets(Y[train])
    z = basis.project_rows(test)
    y_mean = Y[train].mean(axis=0)
    r2 = np.empty((len(alphas), Y.shape[1]))
    r = np.empty_like(r2) if pearson else None
    y_test = Y[test]
    for i, alpha in enumerate(alphas):
        pred = z @ (a_proj / (basis.s2 + alpha)[:, None]) + y_mean
        r2[i] = r2_columns(y_test, pred)
        if r is not None:
            r[i] = pearson_columns(y_test, pred)
    return r2, r


class RidgePathCV(RegressorMixin, BaseEstimator):
    """Ridge with the penalty chosen per target by (blocked) cross-validation.

    Every penalty in ``alphas`` is scored on every inner fold from one eigendecomposition per
    fold (:class:`RidgeBasis`); each target column gets the penalty with the best mean R^2.
    The model is then refitted on all rows.

    Parameters
    ----------
    alphas : sequence of float, default=(0.1, 1, 10, 100, 1e3, 1e4, 1e5)
    cv : splitter or None, default=None
        Inner splitter; None means ``BlockedKFold(5)``.
    standardize : bool, default=True
    n_components : int, default=0
        Principal components kept inside each training set (0 = all).

    Attributes
    ----------
    alpha_ : float or ndarray of shape (n_targets,)
    coef_ : ndarray of shape (n_features,) or (n_targets, n_features)
    intercept_ : float or ndarray of shape (n_targets,)
    cv_r2_ : ndarray of shape (n_alphas, n_targets)
        Mean inner-fold R^2 of each penalty.

    References
    ----------
    Hoerl AE, Kennard RW (1970). Technometrics 12:55-67. doi:10.1080/00401706.1970.10488634
    """

    def __init__(self, alphas=(0.1, 1.0, 10.0, 100.0, 1e3, 1e4, 1e5), *, cv=None,
                 standardize=True, n_components=0):
        self.alphas = alphas
        self.cv = cv
        self.standardize = standardize
        self.n_components = n_components

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.target_tags.multi_output = True
        return tags

    def fit(self, X, y, groups=None):
        from pipeline.analysis.cv import BlockedKFold

        X, y = validate_data(self, X, y, multi_output=True, y_numeric=True,
                             dtype=[np.float64, np.float32])
        alphas = np.asarray(self.alphas, dtype=np.float64).ravel()
        if alphas.size == 0 or np.any(alphas <= 0):
            raise ConfigError(f"alphas = {list(alphas)}: expected positive penalties")
        Y = np.asarray(y, dtype=np.float64)
        Y2 = Y.reshape(len(Y), -1)
        cv = BlockedKFold(5) if self.cv is None else self.cv
        if len(alphas) > 1:
            if X.shape[0] < 2 * cv.get_n_splits():
                raise InputError(f"RidgePathCV: n_samples = {X.shape[0]} is too few for "
                                 f"{cv.get_n_splits()} inner folds")
            total = np.zeros((alphas.size, Y2.shape[1]))
            n_folds = 0
            for train, test in cv.split(X, Y2, groups):
                r2, _ = path_scores(X, Y2, train, test, alphas=alphas,
                                    standardize=self.standardize,
                                    n_components=self.n_components, pearson=False)
                total += r2
                n_folds += 1
            self.cv_r2_ = total / n_folds
            best = alphas[np.argmax(self.cv_r2_, axis=0)]
        else:
            self.cv_r2_ = np.full((1, Y2.shape[1]), np.nan)
            best = np.full(Y2.shape[1], alphas[0])
        basis = RidgeBasis(X, np.arange(X.shape[0]), standardize=self.standardize,
                           n_components=self.n_components)
        a_proj = basis.project_targets(Y2)
        coef = basis.coef(a_proj / (basis.s2[:, None] + best[None, :]))
        intercept = Y2.mean(axis=0) - basis.mean @ coef
        if Y.ndim == 1:
            self.coef_, self.intercept_, self.alpha_ = coef[:, 0], intercept[0], best[0]
        else:
            self.coef_, self.intercept_, self.alpha_ = coef.T, intercept, best
        return self

    def predict(self, X):
        check_is_fitted(self)
        X = validate_data(self, X, reset=False, dtype=[np.float64, np.float32])
        return np.asarray(X, dtype=np.float64) @ np.asarray(self.coef_).T + self.intercept_
