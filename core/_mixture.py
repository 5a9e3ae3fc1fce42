"""The Gaussian mixture: validated parameters, scoring, sampling, conditioning."""

from __future__ import annotations

import math
import threading
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

from ._covariance import Covariance, covariance_class
from ._explain import Explanation, explain_rows
from ._incomplete import (
    PreparedRows,
    log_conditional_peaks,
    log_joints,
    log_sum_exp,
    pattern_log_densities,
    prepare_rows,
)
from ._scoring import SMALL_BATCH_ROWS, CompiledMixture
from ._validation import (
    FloatArray,
    as_float_array,
    as_points,
    check_finite,
    check_no_infinite,
    check_shape,
    check_structure,
    check_weights,
)

#: Version of the dictionary layout written by ``Mixture.to_dict``.
SCHEMA_VERSION = 1
#: Below this sum of squares, a few rows cannot overflow any distance computation.
SAFE_SQUARED_NORM = 1e200
#: Rows sharing a missing pattern from which the pattern's own marginal is compiled
#: (and kept); rarer patterns are scored together (``_incomplete``), which costs more
#: per row and nothing to set up.
COMPILE_AT = 32
#: Rows per block of sampling; conditioning and explaining take blocks whose
#: temporaries stay within about TEMPORARY_BYTES: a row of a block holds this many
#: arrays of k d values. Explaining was measured with tracemalloc at 0.9 to 1.0 for
#: fitted-like mixtures and 3.6 for one of 32 crowded components (d 16); 20 000 rows
#: at k 8, d 16 stay in one block (split, they took a third longer).
BLOCK_ROWS = 4096
TEMPORARY_BYTES = 128 * 2**20
CONDITION_ARRAYS, EXPLAIN_ARRAYS = 2, 4
#: Distinct missing-value patterns whose compiled marginals are kept, and their memory
#: at most (the oldest go first).
MARGINAL_CACHE_SIZE = 256
MARGINAL_CACHE_BYTES = 16 * 2**20


class Mixture:
    """A Gaussian mixture with k components in d dimensions.

    Parameters
    ----------
    weights : array_like, shape (k,)
        Mixing proportions: non-negative, summing to 1 within 1e-6 (then renormalised).
    means : array_like, shape (k, d)
    covariances : array_like
        Shape (k, d, d) for ``full``, (k, d) for ``diagonal``, (k,) for
        ``spherical`` and (d, d) for ``shared``; every covariance positive definite.
    structure : {"full", "diagonal", "spherical", "shared"}

    Raises
    ------
    ValueError
        Naming the argument (and component) that is inconsistent.

    Examples
    --------
    >>> m = Mixture([0.5, 0.5], [[0.0], [4.0]], [[[1.0]], [[1.0]]])
    >>> m.log_density([[0.0], [2.0]]).round(4)
    array([-1.6118, -2.9189])
    >>> m.responsibilities([[2.0]])
    array([[0.5, 0.5]])
    """

    def __init__(
        self, weights: Any, means: Any, covariances: Any, structure: str = "full"
    ) -> None:
        structure = check_structure(structure)
        means_array = as_float_array(means, "means")
        if means_array.ndim != 2 or 0 in means_array.shape:
            raise ValueError(
                f"means must be 2-D (k, d) with k >= 1 and d >= 1; got shape {means_array.shape}"
            )
        check_finite(means_array, "means")
        k, d = means_array.shape
        weights_array = as_float_array(weights, "weights")
        check_shape(weights_array, (k,), "weights")
        weights_array = check_weights(weights_array)
        covariance = covariance_class(structure).validated(covariances, k, d)
        self._setup(weights_array, means_array.copy(), covariance)

    @classmethod
    def _trusted(cls, weights: FloatArray, means: FloatArray, covariance: Covariance) -> Mixture:
        """Build from parameters the fitting code already guarantees."""
        mixture = cls.__new__(cls)
        mixture._setup(weights, means, covariance)
        return mixture

    def _setup(self, weights: FloatArray, means: FloatArray, covariance: Covariance) -> None:
        for array in (weights, means, covariance.array):
            array.flags.writeable = False
        self._weights = weights
        self._means = means
        self._covariance = covariance
        self._compiled: CompiledMixture | None = None
        self._marginals: dict[bytes, tuple[np.ndarray, CompiledMixture]] = {}
        self._marginal_bytes = 0
        # Requests score one mixture on several threads at once: the marginals are
        # read, added and evicted under this lock.
        self._marginals_lock = threading.Lock()
        self._precision_cache: FloatArray | None = None

    # -- description -----------------------------------------------------------------

    @property
    def structure(self) -> str:
        return self._covariance.structure

    @property
    def weights(self) -> FloatArray:
        return self._weights

    @property
    def means(self) -> FloatArray:
        return self._means

    @property
    def covariances(self) -> FloatArray:
        """In the structure's own shape (see the class docstring)."""
        return self._covariance.array

    @property
    def components(self) -> int:
        return self._means.shape[0]

    @property
    def dimension(self) -> int:
        return self._means.shape[1]

    @property
    def parameter_count(self) -> int:
        """Free parameters: k - 1 weights, k d means and the covariance parameters."""
        k, d = self._means.shape
        return k - 1 + k * d + self._covariance.parameter_count(k, d)

    def __repr__(self) -> str:
        return (
            f"Mixture(components={self.components}, dimension={self.dimension}, "
            f"structure={self.structure!r})"
        )

    # -- scoring ---------------------------------------------------------------------

    def compiled(self) -> CompiledMixture:
        """The precomputed factors used for scoring, built once."""
        if self._compiled is None:
            self._compiled = CompiledMixture(self._weights, self._means, self._covariance)
        return self._compiled

    def log_density(self, X: Any) -> FloatArray:
        """Log of the mixture density at each row of X, shape (n,).

        NaN entries are missing: the row is scored by the marginal mixture of its
        observed features.

        Examples
        --------
        >>> m = Mixture([1.0], [[0.0, 0.0]], [[[1.0, 0.0], [0.0, 1.0]]])
        >>> m.log_density([[0.0, float("nan")]]).round(6)  # the 1-D standard normal at 0
        array([-0.918939])
        """
        X = as_points(X, self.dimension)
        compiled = self._compiled or self.compiled()
        # One BLAS call vouches that a few rows are finite and far from overflow,
        # which lets the single-point path skip every guard.
        if X.shape[0] <= SMALL_BATCH_ROWS and np.vdot(X, X) < SAFE_SQUARED_NORM:
            return compiled.log_density_few(X)
        out = compiled.log_density(X)
        # One cheap reduction tells whether any row needs the missing-value path.
        if not math.isfinite(out.sum()):
            self._repair(X, out, lambda compiled, rows: compiled.log_density(rows),
                         _log_density_of, np.inf)
        return out

    def responsibilities(self, X: Any) -> FloatArray:
        """Posterior probability of each component for each row, shape (n, k).

        Rows sum to 1; NaN entries are marginalised out as in ``log_density``.
        """
        X = as_points(X, self.dimension)
        out = self.compiled().responsibilities(X)
        if not math.isfinite(out.sum()):
            self._repair(X, out, lambda compiled, rows: compiled.responsibilities(rows),
                         _responsibilities_of, None)
        return out

    def labels(self, X: Any) -> np.ndarray:
        """Index of the most probable component for each row, shape (n,)."""
        return np.argmax(self.responsibilities(X), axis=1)

    def _repair(
        self,
        X: FloatArray,
        out: FloatArray,
        score: Callable[[CompiledMixture, FloatArray], FloatArray],
        from_joints: Callable[[FloatArray], FloatArray],
        overflow: float | None,
    ) -> None:
        """Re-score rows whose dense result is not finite: missing entries or overflow.

        A pattern of COMPILE_AT rows or more is scored by its compiled marginal (kept);
        rarer ones by ``_incomplete.log_joints``, all at once, then ``from_joints``."""
        bad = ~np.isfinite(out) if out.ndim == 1 else ~np.isfinite(out).all(axis=1)
        rows = np.flatnonzero(bad)
        subset = np.take(X, rows, axis=0)  # take: several times faster than X[rows]
        check_no_infinite(subset, rows=rows)
        missing = np.isnan(subset)
        complete = ~missing.any(axis=1)
        if complete.any():
            # Finite rows that overflowed: far beyond every component.
            if overflow is None:
                raise ValueError(_TOO_FAR.format(int(rows[complete][0])))
            out[rows[complete]] = -overflow
        patterns, incomplete = missing[~complete], rows[~complete]
        groups, rare = self._patterns(patterns, incomplete, COMPILE_AT)
        for members, observed, compiled in groups:
            out[members] = score(compiled, _take(X, members, observed))
            if overflow is None:
                _check_compared(out[members], members)
        rare, members = patterns[rare], incomplete[rare]
        if members.size:
            if rare.all(axis=1).any():
                raise ValueError(f"X[{int(members[np.argmax(rare.all(axis=1))])}] has no "
                                 "observed feature")
            out[members] = from_joints(log_joints(self._weights, self._means,
                                                  self._covariance,
                                                  np.take(X, members, axis=0), rare))
            if overflow is None:
                _check_compared(out[members], members)

    def _patterns(
        self, missing: np.ndarray, rows: np.ndarray, min_rows: int = 1
    ) -> tuple[list[tuple[np.ndarray, np.ndarray, CompiledMixture]], np.ndarray]:
        """Group rows by missing pattern: (row indices, observed features, marginal) of
        the patterns of ``min_rows`` rows or more, and which rows the others hold."""
        if rows.size == 0:
            return [], np.zeros(0, dtype=bool)
        unique, inverse, counts = np.unique(_pattern_codes(missing), return_inverse=True,
                                            return_counts=True)
        inverse = inverse.reshape(-1)
        order = np.argsort(inverse, kind="stable")
        bounds = np.cumsum(counts)[:-1]
        groups = []
        for key, count, positions in zip(unique, counts, np.split(order, bounds), strict=True):
            if count < min_rows:
                continue
            pattern = missing[positions[0]]
            if pattern.all():
                raise ValueError(f"X[{int(rows[positions[0]])}] has no observed feature")
            observed, compiled = self._marginal_compiled(key.tobytes(), pattern)
            groups.append((rows[positions], observed, compiled))
        return groups, counts[inverse] < min_rows

    def _marginal_compiled(
        self, key: bytes, missing: np.ndarray
    ) -> tuple[np.ndarray, CompiledMixture]:
        with self._marginals_lock:
            cached = self._marginals.get(key)
        if cached is None:
            observed = np.flatnonzero(~missing)
            cached = (observed, self.marginal(observed).compiled())
            size = cached[1].nbytes
            with self._marginals_lock:
                while self._marginals and (
                        len(self._marginals) >= MARGINAL_CACHE_SIZE
                        or self._marginal_bytes + size > MARGINAL_CACHE_BYTES):
                    self._marginal_bytes -= self._marginals.pop(
                        next(iter(self._marginals)))[1].nbytes
                if key not in self._marginals:
                    self._marginals[key] = cached
                    self._marginal_bytes += size
        return cached

    def marginal_log_densities(self, rows: FloatArray | PreparedRows, patterns: np.ndarray
                               ) -> FloatArray:
        """(P, m) log-densities of complete ``rows`` (m, d) under the marginal that each
        missing pattern of ``patterns`` (P, d) leaves; ``prepare``d rows cost less."""
        return pattern_log_densities(self._weights, self._means, self._covariance, rows,
                                     patterns, self._precisions())

    def prepare(self, rows: FloatArray) -> PreparedRows:
        """Complete rows (m, d) made ready to be scored under many missing patterns."""
        return prepare_rows(self._means, self._precisions(), rows, self.log_joints(rows))

    def log_conditional_peaks(self, patterns: np.ndarray) -> FloatArray:
        """(P, k) the most a row's log-joint under each component can exceed its
        marginal's, per missing pattern."""
        return log_conditional_peaks(self._covariance, patterns)

    def log_joints(self, X: FloatArray) -> FloatArray:
        """(n, k) log w_j + log N(x | mu_j, S_j) of complete rows."""
        kernel = self.compiled().kernel
        return np.concatenate([kernel.rows(X[start : start + BLOCK_ROWS])
                               for start in range(0, len(X), BLOCK_ROWS)] or [
                                   np.empty((0, self.components))])

    def nbytes_at_most(self) -> int:
        """Memory it can come to while scoring: parameters, compiled factors, precisions
        and the marginals of missing patterns it keeps."""
        compiled = self.compiled().nbytes
        parameters = self._weights.nbytes + self._means.nbytes + self._covariance.array.nbytes
        precisions = 8 * self.components * self.dimension**2
        marginals = min(MARGINAL_CACHE_BYTES, MARGINAL_CACHE_SIZE * compiled)
        return parameters + compiled + precisions + marginals

    # -- generation and conditioning -------------------------------------------------

    def sample(
        self, n: int, seed: int | np.random.Generator | None = None
    ) -> tuple[FloatArray, np.ndarray]:
        """Draw n points: a component by the weights, then its Gaussian.

        Returns (points (n, d), components (n,)); the same seed gives the same draw.

        Examples
        --------
        >>> m = Mixture([0.3, 0.7], [[0.0], [10.0]], [1.0, 1.0], structure="spherical")
        >>> points, components = m.sample(5, seed=1)
        >>> points.shape, components.shape
        ((5, 1), (5,))
        """
        if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 0:
            raise ValueError(f"n must be a non-negative integer; got {n!r}")
        rng = np.random.default_rng(seed)
        components = rng.choice(self.components, size=int(n), p=self._weights)
        points = np.empty((int(n), self.dimension))
        # In blocks, so that temporaries stay small whatever n; consecutive draws of one
        # generator are the draw of all rows at once, so the blocks do not change it.
        for start in range(0, int(n), BLOCK_ROWS):
            chosen = components[start : start + BLOCK_ROWS]
            noise = rng.standard_normal((chosen.size, self.dimension))
            points[start : start + chosen.size] = (
                self._means[chosen] + self._covariance.scale_noise(noise, chosen))
        return points, components

    def condition(self, X: Any) -> FloatArray:
        """Fill each NaN entry with its conditional mean given the row's observed entries.

        The conditional mean of a mixture is the responsibility-weighted mean of the
        per-component Gaussian conditionals mu_m + S_mo S_oo^-1 (x_o - mu_o), with
        responsibilities from the marginal on the observed features.

        Examples
        --------
        >>> m = Mixture([1.0], [[0.0, 0.0]], [[[1.0, 0.8], [0.8, 1.0]]])
        >>> m.condition([[1.0, float("nan")]])
        array([[1. , 0.8]])
        """
        X = as_points(X, self.dimension)
        check_no_infinite(X)
        missing = np.isnan(X)
        incomplete = np.flatnonzero(missing.any(axis=1))
        filled = X.copy()
        step = self._block_rows(CONDITION_ARRAYS)
        for rows, observed, compiled in self._patterns(missing[incomplete], incomplete)[0]:
            absent = np.flatnonzero(missing[rows[0]])
            coefficients = self._covariance.regression(observed, absent)
            for start in range(0, rows.size, step):
                members = rows[start : start + step]
                filled[np.ix_(members, absent)] = self._conditional_means(
                    X, members, observed, absent, compiled, coefficients)
        return filled

    def _conditional_means(self, X: FloatArray, members: np.ndarray, observed: np.ndarray,
                           absent: np.ndarray, compiled: CompiledMixture,
                           coefficients: FloatArray | None) -> FloatArray:
        observed_rows = _take(X, members, observed)
        resp = compiled.responsibilities(observed_rows)
        _check_compared(resp, members)
        means_missing = self._means[:, absent]
        if coefficients is None:
            return resp @ means_missing
        deviations = observed_rows[:, None, :] - self._means[None][:, :, observed]
        conditional = means_missing + np.einsum("nko,kmo->nkm", deviations, coefficients)
        return np.einsum("nk,nkm->nm", resp, conditional)

    def _block_rows(self, arrays: int) -> int:
        """Rows whose ``arrays`` temporaries of k d values each fit in TEMPORARY_BYTES
        (at least 64)."""
        return max(64, TEMPORARY_BYTES // (8 * arrays * self.components * self.dimension))

    def explain(self, X: Any) -> Explanation:
        """Why each row is unusual, feature by feature.

        For each observed feature j of a row, its distribution given the row's other
        observed features is a 1-D mixture (see ``_explain``): returned are x_j's log-
        density under it, its two-sided tail 2 min(F, 1 - F), its mean and standard
        deviation, each (n, d) with NaN where the feature is missing (missing features
        are conditioned out, not on), and the feature of smallest tail per row.

        Examples
        --------
        >>> m = Mixture([1.0], [[0.0, 0.0]], [[[1.0, 0.8], [0.8, 1.0]]])
        >>> e = m.explain([[1.0, -1.0]])
        >>> e.conditional_mean.round(3), e.conditional_sd.round(3), e.most_unusual
        (array([[-0.8,  0.8]]), array([[0.6, 0.6]]), array([0]))
        """
        X = as_points(X, self.dimension)
        if np.isfinite(X).all():  # the common case: complete rows, no copies
            outputs, most_unusual = _explained(self, X)
        else:
            check_no_infinite(X)
            missing = np.isnan(X)
            outputs = self._explain_incomplete(X, missing, missing.any(axis=1))
            most_unusual = np.argmin(np.where(missing, np.inf, outputs[1]), axis=1)
        log_density, tail, mean, sd = outputs
        return Explanation(log_density, tail, mean, sd, most_unusual)

    def _explain_incomplete(self, X: FloatArray, missing: np.ndarray, incomplete: np.ndarray
                            ) -> FloatArray:
        outputs = np.full((4, *X.shape), np.nan)
        complete = np.flatnonzero(~incomplete)
        if complete.size:
            outputs[:, complete] = _explained(self, np.take(X, complete, axis=0))[0]
        rows = np.flatnonzero(incomplete)
        for members, observed, _ in self._patterns(missing[rows], rows)[0]:
            outputs[:, members[:, None], observed] = _explained(
                self.marginal(observed), _take(X, members, observed))[0]
        return outputs

    def _precisions(self) -> FloatArray:
        if self._precision_cache is None:
            self._precision_cache = self._covariance.precisions()
        return self._precision_cache

    def marginal(self, features: Sequence[int] | np.ndarray) -> Mixture:
        """The mixture of the given features (indices), with the same weights.

        Examples
        --------
        >>> m = Mixture([1.0], [[1.0, 2.0]], [[[1.0, 0.5], [0.5, 2.0]]])
        >>> m.marginal([1]).covariances
        array([[[2.]]])
        """
        index = np.asarray(features)
        if (
            index.ndim != 1 or index.size == 0 or index.dtype.kind not in "iu"
            or len(np.unique(index)) != index.size
            or index.min() < 0 or index.max() >= self.dimension
        ):
            raise ValueError(
                f"features must be distinct indices in [0, {self.dimension}); got {features!r}"
            )
        return Mixture._trusted(
            self._weights, self._means[:, index].copy(), self._covariance.marginal(index)
        )

    # -- serialisation ---------------------------------------------------------------

    def to_dict(self) -> dict[str, Any]:
        """A JSON-safe dictionary; ``Mixture.from_dict`` reads it back exactly."""
        return {
            "schema_version": SCHEMA_VERSION,
            "structure": self.structure,
            "weights": self._weights.tolist(),
            "means": self._means.tolist(),
            "covariances": self._covariance.array.tolist(),
        }

    @classmethod
    def from_dict(cls, data: dict[str, Any]) -> Mixture:
        version = data.get("schema_version")
        if version != SCHEMA_VERSION:
            raise ValueError(f"schema_version must be {SCHEMA_VERSION}; got {version!r}")
        missing = {"structure", "weights", "means", "covariances"} - data.keys()
        if missing:
            raise ValueError(f"missing keys: {', '.join(sorted(missing))}")
        return cls(data["weights"], data["means"], data["covariances"], data["structure"])


def _explained(mixture: Mixture, X: FloatArray) -> tuple[FloatArray, np.ndarray]:
    """``explain_rows`` of complete rows X under ``mixture``, in blocks of bounded
    temporaries."""
    most = mixture._block_rows(EXPLAIN_ARRAYS)
    arguments = (mixture._weights, mixture._means, mixture._precisions(),
                 mixture._covariance.log_det())
    if X.shape[0] <= most:
        return explain_rows(*arguments, X)
    # Blocks of equal size: a short last one would miss the threads large ones use.
    step = -(-X.shape[0] // -(-X.shape[0] // most))
    # In the (4, d, n) layout explain_rows writes in: a block is one contiguous copy.
    outputs = np.empty((4, X.shape[1], X.shape[0]))
    most_unusual = np.empty(X.shape[0], dtype=np.intp)
    for start in range(0, X.shape[0], step):
        block = slice(start, start + step)
        found, most_unusual[block] = explain_rows(*arguments, X[block])
        outputs[:, :, block] = found.transpose(0, 2, 1)
    return outputs.transpose(0, 2, 1), most_unusual


def _log_density_of(joints: FloatArray) -> FloatArray:
    return log_sum_exp(joints, axis=1)


def _responsibilities_of(joints: FloatArray) -> FloatArray:
    """Posteriors from log-joints, in log space: finite wherever a joint is."""
    with np.errstate(invalid="ignore"):
        return np.exp(joints - log_sum_exp(joints, axis=1)[:, None])


def _take(X: FloatArray, rows: np.ndarray, columns: np.ndarray) -> FloatArray:
    return np.take(np.take(X, rows, axis=0), columns, axis=1)


def _pattern_codes(missing: np.ndarray) -> np.ndarray:
    """One sortable scalar per row's missing pattern: an integer up to 64 features."""
    packed = np.packbits(missing, axis=1)
    width = packed.shape[1]
    if width <= 8:
        padded = np.zeros((packed.shape[0], 8), dtype=np.uint8)
        padded[:, :width] = packed
        return padded.view(np.uint64).ravel()
    return np.ascontiguousarray(packed).view(np.dtype((np.void, width))).ravel()


_TOO_FAR = "X[{}] is too far from every component to compare them"


def _check_compared(responsibilities: FloatArray, rows: np.ndarray) -> None:
    """Responsibilities of rows whose observed entries overflow every component are not
    numbers: refuse those rows, as for complete ones."""
    finite = np.isfinite(responsibilities).all(axis=1)
    if not finite.all():
        raise ValueError(_TOO_FAR.format(int(rows[np.argmin(finite)])))
