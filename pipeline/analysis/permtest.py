"""Permutation test of bearing terms in a linear model with nuisance regressors, as GEMMs.

Target ``k``'s unique explained variance is ``R^2(full) - R^2(full without k)``, which equals
``||W_k^T y||^2 / ||y - mean||^2`` with ``W_k`` an orthonormal basis of target ``k``'s columns
after projecting out the nuisance and all other targets. Because every basis depends only on
the design, the bases of every permutation are stacked into one matrix and the statistic for
all cells and all permutations is the column-pair sums of squares of one GEMM per block of
cells (see ``tests/benchmarks/bench_tuning.py``).
"""

from __future__ import annotations

import dataclasses

import numpy as np

from pipeline.errors import InputError

__all__ = [
    "bearing_design",
    "UniqueVariance",
    "unique_variance_test",
    "PermutationBases",
    "permutation_bases",
]


def bearing_design(bearings_rad, *, n_harmonics=1):
    """Columns ``cos(h b_k), sin(h b_k)`` for every target ``k`` and harmonic ``h``.

    Returns
    -------
    ndarray of shape (n_samples, n_targets, 2 * n_harmonics)
    """
    b = np.asarray(bearings_rad, dtype=np.float64)
    cols = []
    for h in range(1, int(n_harmonics) + 1):
        cols += [np.cos(h * b), np.sin(h * b)]
    return np.stack(cols, axis=-1)


def _orth(a):
    """Orthonormal basis of the column space of ``a`` (n, q), from its Gram matrix.

    Columns are scaled to unit norm first; directions with eigenvalue below ``1e-12`` of the
    largest (singular value below ``1e-6``) are dropped. A small symmetric eigenproblem instead
    of a QR of the tall matrix: measured 0.3 ms against 350 ms for (1000, 35) on the shared
    2-core test machine, where the threaded tall QR stalls.
    """
    a = np.asarray(a, dtype=np.float64)
    norms = np.linalg.norm(a, axis=0)
    a = a[:, norms > 0] / norms[norms > 0]
    if a.shape[1] == 0:
        return np.zeros((a.shape[0], 0))
    lam, vec = np.linalg.eigh(a.T @ a)
    keep = lam > lam.max() * 1e-12
    q = a @ (vec[:, keep] / np.sqrt(lam[keep]))
    # one re-orthogonalisation pass restores orthonormality lost to the squared condition
    lam2, vec2 = np.linalg.eigh(q.T @ q)
    return q @ (vec2 / np.sqrt(lam2))


def _coef_operator(x):
    """Least-squares coefficient operator ``(X^T X)^+ X^T`` of ``x`` (n, p) via its Gram."""
    x = np.asarray(x, dtype=np.float64)
    return np.linalg.pinv(x.T @ x, hermitian=True) @ x.T


def _orth_batch(a):
    """Orthonormal columns spanning each ``a[i]`` (P, n, m) from its small Gram matrix.

    Directions with eigenvalue below ``1e-10`` of the largest become zero columns, so a
    target with nothing left after the nuisance contributes nothing.
    """
    lam, vec = np.linalg.eigh(a.transpose(0, 2, 1) @ a)                   # (P, m), (P, m, m)
    tol = lam.max(axis=1, keepdims=True, initial=0.0) * 1e-10 + 1e-300
    inv_sqrt = np.where(lam > tol, 1.0 / np.sqrt(np.where(lam > tol, lam, 1.0)), 0.0)
    return a @ (vec * inv_sqrt[:, None, :])


def alone_bases(cols, q_nuis):
    """Each target's columns after the nuisance only, orthonormalised: one basis per target.

    ``cols`` (n, K, m) are the target columns, ``q_nuis`` (n, q) an orthonormal basis of the
    nuisance. A column the nuisance spans is dropped (its residual is rounding noise, which
    an orthonormalisation would scale to unit norm).
    """
    n, n_t, m = cols.shape
    flat = cols.reshape(n, n_t * m)
    resid = flat - q_nuis @ (q_nuis.T @ flat)
    resid[:, np.linalg.norm(resid, axis=0) <= 1e-8 * np.linalg.norm(flat, axis=0)] = 0.0
    return [_orth(resid[:, k * m: (k + 1) * m]) for k in range(n_t)]


def _bases(target_cols, q_nuis):
    """Per permutation: each target's unique basis and the basis of all targets together.

    ``target_cols`` (P, n, K, m) are the (permuted) target columns, ``q_nuis`` (n, q) an
    orthonormal basis of the never-permuted nuisance (intercept included). Returns
    ``unique`` (P, n, K, m): target k's columns after removing the nuisance and every other
    target, orthonormalised; and ``joint`` (P, n, K*m): all targets after the nuisance.
    Everything is stacked ``matmul`` on small Gram matrices.
    """
    p_, n, k, m = target_cols.shape
    flat = target_cols.reshape(p_, n, k * m)
    flat = flat - q_nuis[None] @ (q_nuis.T[None] @ flat)                   # (I - H_Z) X
    joint = _orth_batch(flat)
    resid = flat.reshape(p_, n, k, m)
    unique = np.zeros((p_, n, k, m))
    for j in range(k):
        own = resid[:, :, j]
        if k > 1:
            others = _orth_batch(resid[:, :, [i for i in range(k) if i != j]]
                                 .reshape(p_, n, -1))
            own = own - others @ (others.transpose(0, 2, 1) @ own)
        unique[:, :, j] = _orth_batch(own)
    return unique, joint


@dataclasses.dataclass
class UniqueVariance:
    """Per target and cell: unique R^2 and its p; the joint (any-target) test; alone R^2."""

    unique_r2: np.ndarray       # (n_targets, n_cells) R^2(full) - R^2(full without k)
    p: np.ndarray               # (n_targets, n_cells) permutation p of the unique term
    full_r2: np.ndarray         # (n_cells,)
    bearing_rad: np.ndarray     # (n_targets, n_cells) phase of the first-harmonic coefficients
    n_permutations: int
    joint_r2: np.ndarray | None = None   # (n_cells,) all targets' terms beyond the nuisance
    p_joint: np.ndarray | None = None    # (n_cells,) its permutation p
    alone_r2: np.ndarray | None = None   # (n_targets, n_cells) target k alone beyond nuisance


def unique_variance_test(activity, bearings_rad=None, *, perm_index=None, nuisance=None,
                         fixed_nuisance=None, n_harmonics=1, columns=None,
                         block_cells=4096, dtype=np.float32, perm_columns=None):
    """Bearing terms of every target against activity, with a calibrated permutation null.

    The model is ``activity ~ intercept + nuisance + sum_k X_k``, where ``X_k`` holds target
    ``k``'s columns (``cos``/``sin`` of its bearing, or any precomputed ``columns`` such as the
    indicator-filtered, epoch-gated terms of :mod:`pipeline.analysis.regressors`). Three
    statistics per cell, all as fractions of the activity's variance:

    * ``joint_r2``: what all targets' columns explain beyond the nuisance, with ``p_joint``;
    * ``unique_r2``: what target ``k`` explains beyond the nuisance *and* every other target
      (``R^2(full) - R^2(full without k)``), with ``p``;
    * ``alone_r2``: what target ``k`` explains beyond the nuisance alone (no p-value; used to
      say which target a significant cell follows best).

    Null: the target columns' rows are permuted (``perm_index``, e.g. whole trials) while the
    activity and the nuisance stay together, and every basis is recomputed after the
    nuisance (permutation of the tested regressors with the nuisance kept fixed; Winkler et
    al. 2014, table 2, "Draper-Stoneman"). The activity's nuisance residuals are computed once,
    so the null of all cells and permutations is one GEMM per block of cells: (stacked bases
    of every permutation)^T x residuals.

    Parameters
    ----------
    activity : ndarray of shape (n_samples, n_cells)
        Activity sampled at the same times as the regressors.
    bearings_rad : ndarray of shape (n_samples, n_targets), optional
        Bearings; their ``cos``/``sin`` harmonics are the target columns. Ignored when
        ``columns`` is given.
    perm_index : ndarray of int, shape (n_permutations, n_samples), optional
        Row order of the target columns in each permutation (``trial_shuffle_indices`` or
        ``circular_shift_indices``).
    perm_columns : array of shape (n_permutations, n_samples, n_targets, m), optional
        The target columns of each permutation given outright (a null that is not a row
        reordering, e.g. behaviour of other trials aligned at the split,
        :func:`pipeline.analysis.stats.split_aligned_swap_times`); instead of ``perm_index``.
        Any object with ``shape`` whose slices along the first axis are arrays will do, so
        the permutations can be gathered batch by batch.
    nuisance, fixed_nuisance : ndarray of shape (n_samples, q), optional
        Regressors every model keeps, tied to the activity rows and never permuted (motor terms,
        epoch levels, one indicator per trial...). Both are treated alike (``fixed_nuisance``
        is kept for callers of the earlier interface).
    n_harmonics : int, default=1
        Harmonics of each bearing when ``columns`` is not given.
    columns : ndarray of shape (n_samples, n_targets, m), optional
        Precomputed target columns (the first two of each target are its first harmonic).
    block_cells : int, default=4096
        Cells per GEMM block (memory ``(n_perm + 1) * 2 * n_targets * m * block_cells``).
    dtype : numpy dtype, default=float32
        Precision of the permutation GEMM.

    Returns
    -------
    UniqueVariance

    Raises
    ------
    InputError
        Bearings, columns or permutations whose shapes do not match the activity.

    References
    ----------
    Winkler AM, Ridgway GR, Webster MA, Smith SM, Nichols TE (2014). Permutation inference for
    the general linear model. NeuroImage 92:381-397. doi:10.1016/j.neuroimage.2014.01.060
    Draper NR, Stoneman DM (1966). Testing for the inclusion of variables in linear regression
    by a randomisation technique. Technometrics 8:695-699.
    Phipson B, Smyth GK (2010). Stat Appl Genet Mol Biol 9:39.
    Golub GH, Van Loan CF (2013). Matrix Computations, 4th ed., section 5.2 (QR; the explained
    sum of squares is ``||Q^T y||^2``).
    """
    y_all = np.asarray(activity)
    null = permutation_bases(y_all.shape[0], bearings_rad, perm_index=perm_index,
                             nuisance=nuisance, fixed_nuisance=fixed_nuisance,
                             n_harmonics=n_harmonics, columns=columns, dtype=dtype,
                             perm_columns=perm_columns)
    return null.test(y_all, block_cells=block_cells)


@dataclasses.dataclass
class PermutationBases:
    """Everything of :func:`unique_variance_test` that depends only on the design.

    Built once by :func:`permutation_bases` and applied to any number of cells (for example
    block by block of a dask array, sharing the stack between threads) with :meth:`test`.
    """

    stack: np.ndarray          # (n, (P+1) * 2 * K * m) unique and joint bases, every perm
    unique0: np.ndarray        # (n, K * m) observed unique bases (float64)
    joint0: np.ndarray         # (n, K * m) observed joint basis (float64)
    alone: list                # K bases of each target alone after the nuisance
    q_nuis: np.ndarray         # (n, q) nuisance basis (intercept included)
    pinv: np.ndarray           # pseudo-inverse of the full design (coefficients)
    n_targets: int
    m: int
    n_permutations: int

    def test(self, activity, *, block_cells=4096):
        """Statistics and p-values of every cell (columns of ``activity``)."""
        y_all = np.asarray(activity)
        n_t, m, n_perm = self.n_targets, self.m, self.n_permutations
        width = n_t * m
        if y_all.ndim != 2 or y_all.shape[0] != self.stack.shape[0]:
            raise InputError(f"activity: expected shape ({self.stack.shape[0]}, n_cells), got "
                             f"{y_all.shape}")
        q_nuis, dtype = self.q_nuis, self.stack.dtype
        n_q = q_nuis.shape[1]
        # every basis is orthogonal to the nuisance, so W^T r = W^T y: no residuals needed, and
        # all the thin products are one GEMM
        thin = np.concatenate([q_nuis, self.unique0, self.joint0, *self.alone, self.pinv.T],
                              axis=1)
        cuts = np.cumsum([n_q, width, width] + [b.shape[1] for b in self.alone])
        n_cells = y_all.shape[1]
        uniq = np.empty((n_t, n_cells))
        pval = np.empty((n_t, n_cells))
        full_r2 = np.empty(n_cells)
        joint_r2 = np.empty(n_cells)
        p_joint = np.empty(n_cells)
        alone = np.empty((n_t, n_cells))
        bear = np.empty((n_t, n_cells))
        n = y_all.shape[0]
        for a in range(0, n_cells, int(block_cells)):
            sl = slice(a, min(a + int(block_cells), n_cells))
            y = np.asarray(y_all[:, sl], dtype=np.float64)
            mean_ss = n * y.mean(axis=0) ** 2
            sst = np.sum(y * y, axis=0) - mean_ss
            # centred first, so a large offset cannot swamp float32 rounding
            proj = self.stack.T @ (y - y.mean(axis=0)).astype(dtype)  # the GEMM
            proj *= proj
            ss = proj.reshape(n_perm + 1, 2, n_t, m, -1).sum(axis=3)  # (P+1, 2, K, cells)
            obs = ss[0]
            # a tiny relative tolerance so float32 rounding never turns ties into exceedances
            exceed = np.sum(ss[1:, 0] >= obs[0][None] * (1 - 1e-5), axis=0)
            joint_null = ss[1:, 1].sum(axis=1)
            exceed_j = np.sum(joint_null >= obs[1].sum(axis=0)[None] * (1 - 1e-5), axis=0)
            parts = np.split(thin.T @ y, cuts, axis=0)
            nuis_ss = np.sum(parts[0] ** 2, axis=0) - mean_ss
            obs_u = np.sum(parts[1].reshape(n_t, m, -1) ** 2, axis=1)
            obs_j = np.sum(parts[2] ** 2, axis=0)
            with np.errstate(invalid="ignore", divide="ignore"):
                uniq[:, sl] = np.where(sst > 0, obs_u / sst, 0.0)
                joint_r2[sl] = np.where(sst > 0, obs_j / sst, 0.0)
                full_r2[sl] = np.where(sst > 0, (nuis_ss + obs_j) / sst, 0.0)
                for k in range(n_t):
                    alone[k, sl] = np.where(sst > 0, np.sum(parts[3 + k] ** 2, axis=0) / sst,
                                            0.0)
            pval[:, sl] = (1.0 + exceed) / (n_perm + 1.0)
            p_joint[sl] = (1.0 + exceed_j) / (n_perm + 1.0)
            coef = parts[-1][:width].reshape(n_t, m, -1)
            bear[:, sl] = np.arctan2(coef[:, 1], coef[:, 0])
        return UniqueVariance(uniq, pval, full_r2, bear, n_perm, joint_r2, p_joint, alone)


def permutation_bases(n, bearings_rad=None, *, perm_index=None, nuisance=None,
                      fixed_nuisance=None, n_harmonics=1, columns=None, dtype=np.float32,
                      perm_columns=None):
    """Bases of the observed design and of every permutation (see :func:`unique_variance_test`).

    Returns
    -------
    PermutationBases
    """
    if columns is None:
        if bearings_rad is None:
            raise InputError("unique_variance_test: give bearings_rad or columns")
        b = np.asarray(bearings_rad, dtype=np.float64)
        if b.ndim != 2 or b.shape[0] != n:
            raise InputError(f"bearings_rad: expected shape ({n}, n_targets), got {b.shape}")
        cols = bearing_design(b, n_harmonics=n_harmonics)
    else:
        cols = np.asarray(columns, dtype=np.float64)
        if cols.ndim != 3 or cols.shape[0] != n:
            raise InputError(f"columns: expected shape ({n}, n_targets, m), got {cols.shape}")
    n_t, m = cols.shape[1], cols.shape[2]
    if perm_columns is not None:
        if not hasattr(perm_columns, "shape"):  # anything sliceable with a shape stays lazy
            perm_columns = np.asarray(perm_columns)
        if len(perm_columns.shape) != 4 or tuple(perm_columns.shape[1:]) != cols.shape:
            raise InputError(f"perm_columns: expected shape (n_permutations, {n}, {n_t}, {m}), "
                             f"got {perm_columns.shape}")
        n_perm = perm_columns.shape[0]

        def batch(a, b):  # rows a..b of [observed, permutation 1, ...]
            parts = ([cols[None]] if a == 0 else []) + [
                np.asarray(perm_columns[max(a - 1, 0): b - 1], dtype=np.float64)]
            return np.concatenate(parts, axis=0)
    else:
        if perm_index is None:
            raise InputError("unique_variance_test: give perm_index or perm_columns")
        perm_index = np.asarray(perm_index)
        if perm_index.ndim != 2 or perm_index.shape[1] != n:
            raise InputError(f"perm_index: expected shape (n_permutations, {n}), got "
                             f"{perm_index.shape}")
        n_perm = perm_index.shape[0]
        orders = np.vstack([np.arange(n)[None, :], perm_index])

        def batch(a, b):
            return cols[orders[a: b]]
    parts = [np.ones((n, 1))] + [np.asarray(a, dtype=np.float64).reshape(n, -1)
                                 for a in (nuisance, fixed_nuisance) if a is not None]
    z_all = np.concatenate(parts, axis=1)
    q_nuis = _orth(z_all)
    width = n_t * m
    stack = np.empty((n, n_perm + 1, 2, width), dtype=dtype)
    step = max(1, int(2**24 // (n * width * 8)))              # ~16 MB of float64 per batch
    for a in range(0, n_perm + 1, step):
        block = batch(a, min(a + step, n_perm + 1))
        uniq_b, joint_b = _bases(block, q_nuis)
        stack[:, a: a + block.shape[0], 0] = uniq_b.reshape(block.shape[0], n, width) \
            .transpose(1, 0, 2)
        stack[:, a: a + block.shape[0], 1] = joint_b.transpose(1, 0, 2)
    uniq0, joint0 = _bases(cols[None], q_nuis)
    uniq0, joint0 = uniq0[0].reshape(n, width), joint0[0]
    stack2 = stack.reshape(n, -1)
    alone_b = alone_bases(cols, q_nuis)
    full_x = np.concatenate([cols.reshape(n, width), z_all], axis=1)
    pinv = _coef_operator(full_x)
    return PermutationBases(stack2, uniq0, joint0, alone_b, q_nuis, pinv, n_t, m, n_perm)
