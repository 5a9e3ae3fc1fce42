"""Per-feature explanations: each feature's distribution given the row's other features.

For a point x and a feature j, x_j given the other features x_-j is a 1-D Gaussian
mixture: component k keeps weight pi_k proportional to w_k N(x_-j | k) (Bayes' rule
on the marginal of the others) and is the Gaussian conditional of x_j within k. Both
come from the precision matrix P_k and z_k = P_k (x - mu_k) without a factorisation
per feature (the conditional of one coordinate given all others is one downdate of
the joint):

    var_kj  = 1 / P_k,jj                    mean_kj = x_j - z_kj / P_k,jj
    log N(x_j | x_-j, k) = 1/2 log(P_k,jj / 2 pi) - z_kj^2 / (2 P_k,jj)
    log w_k N(x_-j | k)  = log w_k N(x | k) - log N(x_j | x_-j, k)

and the mixture's conditional log-density is log p(x) - log p(x_-j). The two-sided
tail is 2 min(F, 1 - F) of the conditional mixture's CDF F, with both sides summed
from the normal CDF (never as 1 - F, which loses the small tail).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.special import ndtr

from ._scoring import LOG_2PI, log_constants
from ._validation import FloatArray

#: Rows explained at a time: the (rows, k, d) temporaries stay a few megabytes.
ROWS = 2048


@dataclass(frozen=True)
class Explanation:
    """Per row and feature (n, d), NaN where the feature is missing, and per row the
    feature of smallest conditional tail (``most_unusual``, (n,))."""

    conditional_log_density: FloatArray
    conditional_tail: FloatArray
    conditional_mean: FloatArray
    conditional_sd: FloatArray
    most_unusual: np.ndarray


def explain_rows(weights: FloatArray, means: FloatArray, precisions: FloatArray,
                 log_dets: FloatArray, X: FloatArray) -> tuple[FloatArray, ...]:
    """(log-density, tail, mean, sd), each (n, d), of complete rows X under the mixture
    of ``precisions`` (k, d, d) and covariance log-determinants ``log_dets`` (k,)."""
    n, d = X.shape
    k = means.shape[0]
    out = tuple(np.empty((n, d)) for _ in range(4))
    diagonal = np.diagonal(precisions, axis1=1, axis2=2)  # (k, d)
    # z_k = P_k x - P_k mu_k for every component in one GEMM.
    stacked = precisions.transpose(1, 0, 2).reshape(d, k * d)
    offsets = np.einsum("kde,ke->kd", precisions, means)
    component = log_constants(weights, d, log_dets)
    half_log_diagonal = 0.5 * (np.log(diagonal) - LOG_2PI)
    sd_within = 1.0 / np.sqrt(diagonal)
    with np.errstate(divide="ignore", under="ignore", over="ignore", invalid="ignore"):
        for start in range(0, n, ROWS):
            rows = X[start : start + ROWS]
            part = slice(start, start + rows.shape[0])
            z = (rows @ stacked).reshape(-1, k, d)
            z -= offsets
            # log w_k N(x | k) = c_k - (x - mu_k).z_k / 2
            joint = component - 0.5 * (np.einsum("cd,ckd->ck", rows, z)
                                       - np.einsum("kd,ckd->ck", means, z))
            standard = z * sd_within  # (x_j - mean_kj) / sd_kj
            others = np.square(standard)
            others *= 0.5
            others -= half_log_diagonal
            others += joint[:, :, None]  # log w_k N(x_-j | k), from log N(x_j | x_-j, k)
            top = others.max(axis=1, keepdims=True)
            share = np.exp(others - top, out=others)
            total = share.sum(axis=1)
            share /= total[:, None, :]  # pi_k
            others_total = np.log(total) + top[:, 0, :]  # log p(x_-j)
            out[0][part] = np.logaddexp.reduce(joint, axis=1)[:, None] - others_total
            lower, upper = _two_sided(share, standard)
            out[1][part] = np.minimum(2.0 * np.minimum(lower, upper), 1.0)
            conditional_means = z
            conditional_means /= -diagonal
            conditional_means += rows[:, None, :]
            mean = np.einsum("ckd,ckd->cd", share, conditional_means)
            conditional_means -= mean[:, None, :]
            np.square(conditional_means, out=conditional_means)
            conditional_means += sd_within**2
            out[2][part] = mean
            out[3][part] = np.sqrt(np.einsum("ckd,ckd->cd", share, conditional_means))
    return out


#: Components of a smaller share are left out of a CDF at first; they are added back
#: where the tail found without them is small enough for them to matter.
NEGLIGIBLE_SHARE = 1e-20
#: ... that is, where it is below this: their sum (under k * NEGLIGIBLE_SHARE) is then
#: still more than a 1e-12 part of it.
EXACT_TAIL = 1e-6


def _two_sided(share: FloatArray, standard: FloatArray) -> tuple[FloatArray, FloatArray]:
    """F and 1 - F of each conditional mixture, summed from the smaller side of each
    component: one normal CDF per term, and none for a term that cannot matter."""
    small = np.zeros_like(standard)
    live = share > NEGLIGIBLE_SHARE
    small[live] = ndtr(-np.abs(standard[live]))  # the smaller of Phi(t) and Phi(-t)
    lower, upper = _sides(share, standard, small)
    rare = np.minimum(lower, upper) < EXACT_TAIL
    if rare.any():
        redo = rare[:, None, :] & ~live
        small[redo] = ndtr(-np.abs(standard[redo]))
        lower, upper = _sides(share, standard, small)
    return lower, upper


def _sides(share: FloatArray, standard: FloatArray, small: FloatArray
           ) -> tuple[FloatArray, FloatArray]:
    negative = standard < 0
    phi = np.where(negative, small, 1.0 - small)  # Phi(t)
    lower = np.einsum("ckd,ckd->cd", share, phi)
    np.subtract(1.0, phi, out=phi)  # Phi(-t): exact where it is the small side
    np.copyto(phi, small, where=~negative)
    return lower, np.einsum("ckd,ckd->cd", share, phi)
