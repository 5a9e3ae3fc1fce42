"""Rows with missing features, scored without a marginal mixture per pattern.

A missing pattern scored through a marginal mixture of its own costs some 0.3 ms of
set-up (a factor of each component's observed block, a kernel), worth it when many
rows share the pattern: 2 000 rows of 2 000 distinct patterns spent 0.5 s on set-up
alone (k 8, d 16). Here rows are grouped by how many features they observe, and the
observed block of every component's covariance is factorised for all rows of a group
in one batched call; diagonal and spherical covariances need no factor at all. The
result per row and component is log w_j + log N(x_o | mu_jo, S_joo).

The same rows scored under many patterns (``pattern_log_densities``) can be
``PreparedRows``: with each row's log-joint and precision-weighted deviation
u_j = P_j (x - mu_j) at hand, a pattern missing r features costs r^2 per row and
component, not o^2, for the marginal's log-joint is the complete one plus the
conditional's peak deficit: log w_j N(x_o) = log w_j N(x) + (r log 2 pi - log|P_j,mm|
+ u_jm' P_j,mm^-1 u_jm) / 2, the last term being the conditional's squared distance
(its precision is P_j,mm, and x_m minus its conditional mean is P_j,mm^-1 u_jm).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ._covariance import Covariance, SharedCovariance
from ._scoring import LOG_2PI
from ._validation import FloatArray

#: Values of a group's temporaries (rows x components x observed^2): the group is cut
#: into parts that stay within this. With parts of 2 MiB, which stay in cache, the tail
#: fractions of 2 000 distinct patterns (loadtests/bench_tails.py) took 0.39 s of CPU,
#: against 0.55 s with parts of 16 MiB.
PART_VALUES = 2**18


def log_joints(weights: FloatArray, means: FloatArray, covariance: Covariance,
               X: FloatArray, missing: np.ndarray) -> FloatArray:
    """(n, k) log w_j + log N(x_o | mu_jo, S_joo) of rows X (n, d) whose ``missing``
    entries (n, d) are left out; every row observes at least one feature. A row far
    beyond the float range gets -inf (or NaN), as in the compiled path."""
    # A weight of 0 gives -inf: a component never chosen.
    with np.errstate(divide="ignore", over="ignore", invalid="ignore", under="ignore"):
        log_weights = np.log(weights)
        if covariance.structure in ("diagonal", "spherical"):
            return _diagonal(log_weights, means, _variances(covariance), X, missing)
        return _matrices(log_weights, means, _matrices_of(covariance), X, missing)


def _diagonal(log_weights: FloatArray, means: FloatArray, variances: FloatArray,
              X: FloatArray, missing: np.ndarray) -> FloatArray:
    k, d = means.shape
    observed = ~missing
    out = np.empty((X.shape[0], k))
    step = max(1, PART_VALUES // (k * d))
    log_variances = np.log(variances)
    for start in range(0, X.shape[0], step):
        part = slice(start, start + step)
        seen = observed[part]
        z = np.where(seen, X[part], 0.0)[:, None, :] - means  # (n, k, d)
        z *= z
        z /= variances
        z *= seen[:, None, :]
        counts = seen.sum(axis=1)
        out[part] = (log_weights - 0.5 * (counts[:, None] * LOG_2PI + seen @ log_variances.T)
                     - 0.5 * z.sum(axis=2))
    return out


def _matrices(log_weights: FloatArray, means: FloatArray, matrices: FloatArray,
              X: FloatArray, missing: np.ndarray) -> FloatArray:
    """Full (k, d, d) or shared (1, d, d) covariances: a batched Cholesky factor of
    each row's observed block, one solve for its whitened deviations."""
    k = means.shape[0]
    out = np.empty((X.shape[0], k))
    counts = (~missing).sum(axis=1)
    for count in np.unique(counts):
        rows = np.flatnonzero(counts == count)
        step = max(1, PART_VALUES // (k * int(count) ** 2))
        for start in range(0, rows.size, step):
            part = rows[start : start + step]
            index = np.nonzero(~missing[part])[1].reshape(part.size, count)
            x = np.take_along_axis(X[part], index, axis=1)  # (g, o)
            lower = np.linalg.cholesky(matrices[:, index[:, :, None], index[:, None, :]])
            deviations = x[None] - means[:, index]  # (k, g, o)
            whitened = np.linalg.solve(lower, deviations[..., None])[..., 0]
            log_dets = 2.0 * np.log(np.diagonal(lower, axis1=-2, axis2=-1)).sum(axis=-1)
            out[part] = (log_weights[:, None] - 0.5 * (count * LOG_2PI + log_dets)
                         - 0.5 * (whitened * whitened).sum(axis=-1)).T
    return out


@dataclass(frozen=True)
class PreparedRows:
    """Complete rows (m, d) to be scored under many missing patterns, with their
    log-joints (k, m) and precision-weighted deviations P_j (x - mu_j) as (k, d, m)."""

    rows: FloatArray
    joints: FloatArray
    deviations: FloatArray

    @property
    def nbytes(self) -> int:
        return self.rows.nbytes + self.joints.nbytes + self.deviations.nbytes


def prepare_rows(means: FloatArray, precisions: FloatArray, rows: FloatArray,
                 joints: FloatArray) -> PreparedRows:
    """``PreparedRows`` of complete ``rows``, whose (m, k) log-joints are ``joints``."""
    deviations = np.einsum("kde,kme->kdm", precisions, rows[None] - means[:, None])
    return PreparedRows(rows, np.ascontiguousarray(joints.T), deviations)


def pattern_log_densities(weights: FloatArray, means: FloatArray, covariance: Covariance,
                          rows: FloatArray | PreparedRows, patterns: np.ndarray,
                          precisions: FloatArray | None = None) -> FloatArray:
    """(P, m): the log-density of each complete row (m, d) under the marginal that each
    missing ``pattern`` (P, d) leaves; the observed blocks are factorised once a pattern.
    Prepared rows take the cheaper route of a pattern missing fewer features than it
    observes, given the (k, d, d) ``precisions``."""
    with np.errstate(divide="ignore", over="ignore", invalid="ignore", under="ignore"):
        return _pattern_log_densities(np.log(weights), means, covariance, rows, patterns,
                                      precisions)


def _pattern_log_densities(log_weights: FloatArray, means: FloatArray,
                           covariance: Covariance, prepared: FloatArray | PreparedRows,
                           patterns: np.ndarray, precisions: FloatArray | None
                           ) -> FloatArray:
    rows = prepared.rows if isinstance(prepared, PreparedRows) else prepared
    k, d = means.shape
    out = np.empty((patterns.shape[0], rows.shape[0]))
    if covariance.structure in ("diagonal", "spherical"):
        variances = _variances(covariance)
        terms = (rows[:, None, :] - means) ** 2 / variances  # (m, k, d), all patterns
        observed = (~patterns).astype(float)
        step = max(1, PART_VALUES // (rows.shape[0] * k))
        for start in range(0, patterns.shape[0], step):
            seen = observed[start : start + step]
            constants = log_weights - 0.5 * (seen.sum(axis=1)[:, None] * LOG_2PI
                                             + seen @ np.log(variances).T)  # (g, k)
            joints = constants[:, None, :] - 0.5 * np.einsum("mkd,gd->gmk", terms, seen)
            out[start : start + step] = log_sum_exp(joints, axis=2)
        return out
    matrices = _matrices_of(covariance)
    counts = (~patterns).sum(axis=1)
    for count in np.unique(counts):
        group = np.flatnonzero(counts == count)
        if isinstance(prepared, PreparedRows) and precisions is not None and 2 * count > d:
            out[group] = _by_precision(prepared, precisions, patterns[group])
            continue
        step = max(1, PART_VALUES // (k * int(count) * rows.shape[0]))
        for start in range(0, group.size, step):
            part = group[start : start + step]
            index = np.nonzero(~patterns[part])[1].reshape(part.size, count)  # (g, o)
            lower = np.linalg.cholesky(matrices[:, index[:, :, None], index[:, None, :]])
            # A solve with m right-hand sides per block ran 40 times slower than the
            # small inverse factors and a batched product; the means are whitened apart.
            # Per pattern, one product of every component's inverse factor, stacked.
            inverse = np.broadcast_to(np.linalg.inv(lower), (k, part.size, count, count))
            stacked = inverse.transpose(1, 0, 2, 3).reshape(part.size, k * count, count)
            whitened = stacked @ rows.T[index]  # (g, k o, m)
            centers = np.einsum("kgab,kgb->gka", inverse, means[:, index])
            whitened -= centers.reshape(part.size, k * count, 1)
            whitened = whitened.reshape(part.size, k, count, -1)
            log_dets = 2.0 * np.log(np.diagonal(lower, axis1=-2, axis2=-1)).sum(axis=-1)
            joints = (log_weights[:, None, None] - 0.5 * (count * LOG_2PI + log_dets[..., None])
                      - 0.5 * np.einsum("gkom,gkom->kgm", whitened, whitened))
            out[part] = log_sum_exp(joints, axis=0)
    return out


def _by_precision(prepared: PreparedRows, precisions: FloatArray,
                  patterns: np.ndarray) -> FloatArray:
    """(P, m) marginal log-densities of prepared rows under patterns that each miss the
    same number r of features, through the conditional of the missing ones."""
    k, _, m = prepared.deviations.shape
    r = int(patterns[0].sum())
    out = np.empty((patterns.shape[0], m))
    step = max(1, PART_VALUES // (k * r * m))
    for start in range(0, patterns.shape[0], step):
        part = slice(start, start + step)
        index = np.nonzero(patterns[part])[1].reshape(-1, r)  # (g, r)
        lower = np.linalg.cholesky(precisions[:, index[:, :, None], index[:, None, :]])
        # Whitened by the inverse factor: a batched product, as in the observed route.
        whitened = np.linalg.inv(lower) @ prepared.deviations[:, index]  # (k, g, r, m)
        log_dets = 2.0 * np.log(np.diagonal(lower, axis1=-2, axis2=-1)).sum(axis=-1)
        joints = (prepared.joints[:, None, :] + 0.5 * (r * LOG_2PI - log_dets[..., None])
                  + 0.5 * np.einsum("kgrm,kgrm->kgm", whitened, whitened))
        out[part] = log_sum_exp(joints, axis=0)
    return out


def log_sum_exp(values: FloatArray, axis: int) -> FloatArray:
    """log sum exp along ``axis``, shifted by its largest term (-inf if all are)."""
    top = np.expand_dims(values.max(axis=axis), axis)
    shift = np.where(np.isfinite(top), top, 0.0)
    with np.errstate(divide="ignore"):
        return np.log(np.exp(values - shift).sum(axis=axis)) + shift.squeeze(axis)


def log_conditional_peaks(covariance: Covariance, patterns: np.ndarray) -> FloatArray:
    """(P, k) log of the highest density each component's missing features can have
    given the observed ones: -(|m| log 2 pi + log|S_j| - log|S_j,oo|) / 2. A row's
    log-joint under component j is at most its marginal's plus this, whatever its
    values."""
    missing_counts = patterns.sum(axis=1)
    if covariance.structure in ("diagonal", "spherical"):
        conditional = patterns.astype(float) @ np.log(_variances(covariance)).T  # (P, k)
    else:
        matrices = _matrices_of(covariance)
        full = 2.0 * np.log(np.diagonal(np.linalg.cholesky(matrices), axis1=-2,
                                        axis2=-1)).sum(axis=-1)  # (K,)
        conditional = np.empty((patterns.shape[0], matrices.shape[0]))
        counts = (~patterns).sum(axis=1)
        for count in np.unique(counts):
            group = np.flatnonzero(counts == count)
            index = np.nonzero(~patterns[group])[1].reshape(group.size, count)
            lower = np.linalg.cholesky(matrices[:, index[:, :, None], index[:, None, :]])
            observed = 2.0 * np.log(np.diagonal(lower, axis1=-2, axis2=-1)).sum(axis=-1)
            conditional[group] = (full[:, None] - observed).T
    return -0.5 * (missing_counts[:, None] * LOG_2PI + np.broadcast_to(
        conditional, (patterns.shape[0], covariance.components)))


def _variances(covariance: Covariance) -> FloatArray:
    """(k, d) variances of a diagonal or spherical covariance."""
    array = covariance.array if covariance.structure == "diagonal" else covariance.array[:, None]
    return np.broadcast_to(array, (covariance.components, covariance.dimension))


def _matrices_of(covariance: Covariance) -> FloatArray:
    """(k, d, d) matrices of a full covariance, (1, d, d) of a shared one."""
    return covariance.array[None] if isinstance(covariance, SharedCovariance) \
        else covariance.array
