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

Most (row, feature) pairs have one component of non-negligible weight: their
conditional is that component's Gaussian. A bound finds the rows where the component
of largest joint is alone for every feature without the (k, d, rows) work of
comparing all components per feature; the other (crowded) rows do that work, and
only the pairs left with several live components, or a tail so small that the
negligible ones may matter, pay for the whole k-term mixture.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.special import erfc, ndtr

from ._kernels import matmul_here
from ._scoring import LOG_2PI, PARALLEL_MIN_ROWS, THREADS, log_constants, thread_pool
from ._validation import FloatArray

#: Rows explained at a time: fewer numpy calls than smaller chunks, temporaries of about
#: 1 MiB for k = 8, d = 16 (measured fastest with loadtests/bench_core.py). Batches of
#: PARALLEL_MIN_ROWS rows or more deal their chunks to two threads, as scoring does.
ROWS = 1024
#: Crowded rows, or mixed pairs, finished together after the chunks.
AT_ONCE = 8192
#: Components of a smaller share are left out of a CDF at first; they are added back
#: where the tail found without them is small enough for them to matter.
NEGLIGIBLE_SHARE = 1e-20
LOG_NEGLIGIBLE_SHARE = float(np.log(NEGLIGIBLE_SHARE))
#: ... that is, where it is below this: their sum (under k * NEGLIGIBLE_SHARE) is then
#: still more than a 1e-12 part of it.
EXACT_TAIL = 1e-6
#: On a lone row every other component's joint is below the winner's by its
#: ``half_gaps`` entry at least; where their sum stays under this share of the
#: winner's, log p(x) is the winner's joint to within rounding, with no exp at all.
NEGLIGIBLE_JOINT = 1e-16
SQRT_HALF = float(np.sqrt(0.5))

#: Pairs whose conditional needs every component (several live, or a tail below
#: EXACT_TAIL): rows, features, (m, k) log weights and standard scores.
MixedPairs = tuple[np.ndarray, np.ndarray, FloatArray, FloatArray]


@dataclass(frozen=True)
class Explanation:
    """Per row and feature (n, d), NaN where the feature is missing, and per row the
    feature of smallest conditional tail (``most_unusual``, (n,))."""

    conditional_log_density: FloatArray
    conditional_tail: FloatArray
    conditional_mean: FloatArray
    conditional_sd: FloatArray
    most_unusual: np.ndarray


class _Factors:
    """What every chunk of one mixture needs, computed once, laid out (k, d, rows) so
    that sums and maxima over the components run over the slowest axis. Rows are
    centred on the mixture mean (smaller terms in the quadratic forms) and carry a
    last coordinate of 1, which folds the constant terms into the GEMMs."""

    def __init__(self, weights: FloatArray, means: FloatArray, precisions: FloatArray,
                 log_dets: FloatArray) -> None:
        k, d = means.shape
        diagonal = np.diagonal(precisions, axis1=1, axis2=2)  # (k, d)
        self.center = weights @ means
        centred = means - self.center
        offsets = np.einsum("kde,ke->kd", precisions, centred)  # P_k mu_k
        self.sd_within = 1.0 / np.sqrt(diagonal)  # (k, d)
        # The standard scores s_kj = (x_j - mean_kj) / sd_kj = sd_kj (P_k x - P_k mu_k)_j
        # of every component in one GEMM.
        self.stacked = (np.concatenate([precisions, -offsets[:, :, None]], axis=2)
                        * self.sd_within[:, :, None]).reshape(k * d, d + 1)
        # log w_k N(x | k) = c_k - (x.z_k - mu_k.z_k) / 2 with z_k = P_k (x - mu_k), x.z_k
        # = sum_j x_j s_kj sqrt(P_k,jj): ``quadratic`` (k, 1, d) weighs the products
        # x_j s_kj, and the GEMM of ``linear`` gives c_k + mu_k.z_k / 2
        # = c_k + (mu_k.P_k x - mu_k.P_k mu_k) / 2.
        self.quadratic = (-0.5 * np.sqrt(diagonal))[:, None, :]
        constants = log_constants(weights, d, log_dets)
        self.linear = np.concatenate(
            [0.5 * offsets, (constants - 0.5 * np.einsum("kd,kd->k", offsets, centred))[:, None]],
            axis=1)
        self.log_diagonal = np.log(diagonal) - LOG_2PI  # h_kj = log(P_k,jj / 2 pi), (k, d)
        self.half_log_diagonal_t = np.ascontiguousarray(0.5 * self.log_diagonal.T)  # (d, k)
        self.sd_within_t = np.ascontiguousarray(self.sd_within.T)
        # half_gaps[k, w]: component k is negligible for every feature of a row on which
        # w has the largest joint when max_j s_kj^2 / 2 + joint_k - joint_w is below it.
        h = self.log_diagonal
        self.half_gaps = 0.5 * (h[:, None, :] - h[None, :, :]).min(axis=2) + LOG_NEGLIGIBLE_SHARE
        others = np.where(np.eye(k, dtype=bool), -np.inf, self.half_gaps)
        self.lone_joint_is_best = bool(
            (np.logaddexp.reduce(others, axis=0) < np.log(NEGLIGIBLE_JOINT)).all())


class _Scratch:
    """Contiguous buffers for chunks of ``rows`` rows, one set per thread: cheap
    passes ran up to 3.5 times as fast on them as on views of the (4, d, n) result."""

    def __init__(self, k: int, d: int, rows: int) -> None:
        self.rows = rows
        self.raw = np.empty((d, rows))  # the chunk's rows, transposed
        self.x = np.empty((d + 1, rows))  # centred, with a row of ones
        self.x[d] = 1.0
        self.scores = np.empty((k * d, rows))
        self.work = np.empty((k, d, rows))
        self.joint = np.empty((k, rows))
        self.relative = np.empty((k, rows))  # the linear terms, then joint_k - joint_w
        self.bound = np.empty((k, rows))
        self.block = np.empty((4, d, rows))
        self.winner_scores = np.empty((d, rows))
        self.offsets = np.arange(d)[:, None] * rows + np.arange(rows)  # of (j, c) in (d, c)


def explain_rows(weights: FloatArray, means: FloatArray, precisions: FloatArray,
                 log_dets: FloatArray, X: FloatArray) -> tuple[FloatArray, np.ndarray]:
    """(log-density, tail, mean, sd) stacked (4, n, d), of complete rows X under the
    mixture of ``precisions`` (k, d, d) and covariance log-determinants ``log_dets``,
    and each row's feature of smallest tail (the first of a tie).

    The first is a view of a (4, d, n) array, the layout every step writes in."""
    f = _Factors(weights, means, precisions, log_dets)
    n, d = X.shape
    k = means.shape[0]
    out = np.empty((4, d, n))
    joint = np.empty((k, n))  # log w_k N(x | k)
    log_joint = np.empty(n)  # log p(x)
    most_unusual = np.empty(n, dtype=np.intp)
    # Crowded rows and mixed pairs are gathered over the whole batch: fewer, larger calls.
    starts = range(0, n, ROWS)
    if n < PARALLEL_MIN_ROWS:
        parts = [_sweep(f, X, starts, out, joint, log_joint, most_unusual)]
    else:  # chunks dealt out to the threads in turn, as scoring does
        pool = thread_pool()
        parts = [future.result() for future in [
            pool.submit(_sweep, f, X, starts[i::THREADS], out, joint, log_joint, most_unusual)
            for i in range(THREADS)]]
    chunks = sorted((chunk for part in parts for chunk in part), key=lambda chunk: chunk[0])
    mixed = [chunk[1] for chunk in chunks]
    crowded = [chunk[2] for chunk in chunks]
    changed = []
    with np.errstate(divide="ignore", under="ignore", over="ignore", invalid="ignore"):
        # Crowded rows and mixed pairs in groups of chunks: fewer, larger calls than one
        # a chunk, and temporaries that stay bounded, where all at once held about ten
        # values a row, feature and component for a mixture of crowded components.
        for members, standard in _grouped(crowded, AT_ONCE):
            for start in range(0, members.size, ROWS):
                block = members[start : start + ROWS]
                found = np.empty((4, d, block.size))
                pairs = _crowded(f, standard[:, :, start : start + ROWS], joint[:, block],
                                 log_joint[block], X[block], found)
                out[:, :, block] = found
                mixed.append((block[pairs[0]], *pairs[1:]))
            changed.append(members)
        for i, j, others, scores in _grouped(mixed, AT_ONCE):
            if i.size:
                out[:, j, i] = _mixtures(others, scores, f.sd_within[:, j].T, X[i, j],
                                         log_joint[i])
            changed.append(i)
        rows = np.unique(np.concatenate([np.empty(0, np.intp), *changed]))
        most_unusual[rows] = np.argmin(out[1][:, rows], axis=0)
    return out.transpose(0, 2, 1), most_unusual


def _grouped(items: list[Any], most: int) -> Iterator[tuple[Any, ...]]:
    """Consecutive items (tuples of arrays: indices first, the last axis of arrays of
    more than one dimension along them) joined into groups of about ``most`` indices."""
    group: list[Any] = []
    size = 0
    for item in [*items, None]:
        if item is not None:
            group.append(item)
            size += item[0].size
            if size < most:
                continue
        if group:
            yield tuple(np.concatenate(field, axis=-1 if field[0].ndim > 2 else 0)
                        for field in zip(*group, strict=True))
        group, size = [], 0


def _sweep(f: _Factors, X: FloatArray, starts: range, out: FloatArray, joint: FloatArray,
           log_joint: FloatArray, most_unusual: np.ndarray
           ) -> list[tuple[int, MixedPairs, tuple[np.ndarray, FloatArray]]]:
    """``_explain_chunk`` on the chunks beginning at ``starts``, into ``out``, ``joint``,
    ``log_joint`` and ``most_unusual`` (on the chunk's tails while they are in cache, a
    twentieth of an explanation that ran on one thread after the others): for each
    chunk, its start, its mixed pairs and its crowded rows, numbered in the batch."""
    found = []
    k, d = f.sd_within.shape
    scratch = _Scratch(k, d, ROWS)
    with np.errstate(divide="ignore", under="ignore", over="ignore", invalid="ignore"):
        for start in starts:
            rows = X[start : start + ROWS]
            part = slice(start, start + rows.shape[0])
            if rows.shape[0] != scratch.rows:  # the batch's last chunk
                scratch = _Scratch(k, d, rows.shape[0])
            pairs, (busy, busy_scores) = _explain_chunk(f, rows, scratch, log_joint[part])
            out[:, :, part] = scratch.block
            np.argmin(scratch.block[1], axis=0, out=most_unusual[part])
            joint[:, part] = scratch.joint
            found.append((start, (pairs[0] + start, *pairs[1:]), (busy + start, busy_scores)))
    return found


def _explain_chunk(f: _Factors, rows: FloatArray, s: _Scratch, log_joint: FloatArray
                   ) -> tuple[MixedPairs, tuple[np.ndarray, FloatArray]]:
    """Fill ``s.joint`` (k, c) and ``log_joint`` (c,) for the chunk's c rows, and
    ``s.block`` (4, d, c) where the component of largest joint is alone for every
    feature. Returns the pairs among those for ``_mixtures``, and the other (crowded)
    rows with their standard scores (k, d, m) for ``_crowded``."""
    k, d = f.sd_within.shape
    c = rows.shape[0]
    x, joint, work, bound, block = s.x, s.joint, s.work, s.bound, s.block
    np.copyto(s.raw, rows.T)
    np.subtract(s.raw, f.center[:, None], out=x[:d])
    matmul_here(f.stacked, x, s.scores)
    scores = s.scores.reshape(k, d, c)
    np.multiply(scores, x[None, :d], out=work)
    np.matmul(f.quadratic, work, out=joint[:, None, :])
    np.matmul(f.linear, x, out=s.relative)
    joint += s.relative
    winner = joint.argmax(axis=0)
    best = joint.max(axis=0)
    relative = np.subtract(joint, best, out=s.relative)
    # Component k is negligible for every feature when, with h_kj = log(P_k,jj / 2 pi),
    # its largest possible log w_k N(x_-j | k), max_j s_kj^2 / 2 + joint_k - h_kj / 2,
    # is below the winner's smallest, joint_w - h_wj / 2, by log NEGLIGIBLE_SHARE; the
    # winner itself never passes (its term is at least 0, its gap below).
    np.abs(scores, out=work)
    np.maximum.reduce(work, axis=1, out=bound)
    np.square(bound, out=bound)
    bound *= 0.5
    bound += relative
    lone = np.count_nonzero(bound < np.take(f.half_gaps, winner, axis=1), axis=0) == k - 1
    crowded = np.flatnonzero(~lone)
    # log p(x) - joint_w: 0 on lone rows when the others' joints cannot add up to a
    # NEGLIGIBLE_JOINT share of the winner's (a tenth of the time went into exp).
    if f.lone_joint_is_best:
        excess = np.zeros(c)
        excess[crowded] = np.log(np.exp(relative[:, crowded]).sum(axis=0))
    else:
        excess = np.log(np.exp(relative, out=relative).sum(axis=0))
    np.add(best, excess, out=log_joint)
    # The winner's standard scores t, sd and h / 2, gathered.
    # (mode="clip" skips a bounds check that buffers the output: the indices are valid.)
    t = np.take(s.scores, s.offsets + winner * (d * c), out=s.winner_scores, mode="clip")
    np.take(f.sd_within_t, winner, axis=1, out=block[3], mode="clip")
    # log p(x) - log p(x_-j) = log N(x_j | x_-j, w) + log p(x) - joint_w, with
    # log N(x_j | x_-j, w) = h_wj / 2 - t_j^2 / 2
    np.take(f.half_log_diagonal_t, winner, axis=1, out=block[0], mode="clip")
    block[0] += excess
    tail = block[1]
    np.square(t, out=tail)
    tail *= 0.5
    block[0] -= tail
    np.abs(t, out=tail)
    tail *= SQRT_HALF
    erfc(tail, out=tail)  # 2 Phi(-|t|)
    t *= block[3]
    np.subtract(s.raw, t, out=block[2])
    if tail.min() < EXACT_TAIL:
        small = tail < EXACT_TAIL
        small &= lone  # crowded rows are explained by _crowded
        j, i = np.nonzero(small)
    else:
        j = i = np.empty(0, np.intp)
    others = 0.5 * (np.square(scores[:, j, i]) - f.log_diagonal[:, j]) + joint[:, i]
    return (i, j, others.T, scores[:, j, i].T), (crowded, scores[:, :, crowded])


def _crowded(f: _Factors, standard: FloatArray, joint: FloatArray, log_joint: FloatArray,
             rows: FloatArray, out: FloatArray) -> MixedPairs:
    """``out`` (4, d, m) for m rows where more than one component may be live, from
    their standard scores (k, d, m) and joints (k, m); returns the mixed pairs."""
    square = np.square(standard)
    # Twice log w_k N(x_-j | k), from log N(x_j | x_-j, k): one multiplication less.
    others = square + 2.0 * joint[:, None, :]
    others -= f.log_diagonal[:, :, None]
    top = others.max(axis=0)
    # 1 where a component is live, else 0: as floats, for faster sums.
    live = (others > top + 2.0 * LOG_NEGLIGIBLE_SHARE).astype(float)
    # Where one component is alone, it is the conditional.
    t = np.einsum("kdc,kdc->dc", live, standard)
    sd = np.einsum("kdc,kd->dc", live, f.sd_within)
    tail = _finish(t, sd, top, log_joint, rows, out)
    mixed = live.sum(axis=0) != 1.0
    mixed |= tail < EXACT_TAIL
    j, i = np.nonzero(mixed)
    return i, j, 0.5 * others[:, j, i].T, standard[:, j, i].T


def _finish(t: FloatArray, sd: FloatArray, top: FloatArray, log_joint: FloatArray,
            rows: FloatArray, out: FloatArray) -> FloatArray:
    """``out`` (4, d, c) of pairs whose conditional is one Gaussian: standard score t,
    sd, ``top`` twice log w N(x_-j | w) and log p(x); returns the tails (d, c)."""
    np.multiply(top, -0.5, out=out[0])
    out[0] += log_joint  # log p(x) - log p(x_-j)
    tail = out[1]
    np.abs(t, out=tail)
    tail *= SQRT_HALF
    erfc(tail, out=tail)  # 2 Phi(-|t|)
    out[3] = sd
    t *= sd
    np.subtract(rows.T, t, out=out[2])
    return tail


def _mixtures(others: FloatArray, standard: FloatArray, sd: FloatArray, x: FloatArray,
              log_joint: FloatArray) -> FloatArray:
    """(log-density, tail, mean, sd) (4, m) of m 1-D mixtures of k terms each: log
    weights (up to a constant) ``others`` (m, k), the point's standard scores, the
    terms' sds, the point and log p(x) of the whole row."""
    top = others.max(axis=1, keepdims=True)
    share = np.exp(others - top)
    total = share.sum(axis=1)
    share /= total[:, None]
    out = np.empty((4, x.shape[0]))
    out[0] = log_joint - np.log(total) - top[:, 0]
    lower, upper = _two_sided(share, standard)
    out[1] = np.minimum(2.0 * np.minimum(lower, upper), 1.0)
    means = x[:, None] - standard * sd
    out[2] = np.einsum("mk,mk->m", share, means)
    means -= out[2][:, None]
    out[3] = np.sqrt(np.einsum("mk,mk->m", share, np.square(means) + np.square(sd)))
    return out


def _two_sided(share: FloatArray, standard: FloatArray) -> tuple[FloatArray, FloatArray]:
    """F and 1 - F of each mixture, summed from the smaller side of each component:
    one normal CDF per term, and none for a term that cannot matter."""
    small = np.zeros_like(standard)
    live = share > NEGLIGIBLE_SHARE
    small[live] = ndtr(-np.abs(standard[live]))  # the smaller of Phi(t) and Phi(-t)
    lower, upper = _sides(share, standard, small)
    rare = np.minimum(lower, upper) < EXACT_TAIL
    if rare.any():
        redo = rare[:, None] & ~live
        small[redo] = ndtr(-np.abs(standard[redo]))
        lower, upper = _sides(share, standard, small)
    return lower, upper


def _sides(share: FloatArray, standard: FloatArray, small: FloatArray
           ) -> tuple[FloatArray, FloatArray]:
    negative = standard < 0
    phi = np.where(negative, small, 1.0 - small)  # Phi(t)
    lower = np.einsum("mk,mk->m", share, phi)
    np.subtract(1.0, phi, out=phi)  # Phi(-t): exact where it is the small side
    np.copyto(phi, small, where=~negative)
    return lower, np.einsum("mk,mk->m", share, phi)
