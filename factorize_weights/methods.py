"""Factorization methods. A method is one object: given a layer's matrix (and, for calibrated
methods, the second moment of its inputs) it decomposes it once into a :class:`Decomposition`,
which hands the allocator its cost-error curve (a :class:`Spectrum`) and gives factors at any rank
by slicing, with no second decomposition. A new method is one class here and one entry in
:data:`METHODS`.

- ``svd``: truncated SVD of the weights (Eckart & Young 1936), exact or randomized (Halko,
  Martinsson & Tropp 2011).
- ``whitened``: truncated SVD of W S with S S^T = G, mapped back by S^{-1}: the least output error
  on the calibration inputs (Wang et al., "SVD-LLM", arXiv 2403.07378, 2024); see whiten.py.
- ``columns``: k actual columns of W chosen by column-pivoted QR, the rest by least squares.

Only the top ``max_saving_rank(m, n)`` singular triplets are kept (the allocator never chooses a
rank at or above break-even), in float32 for float32 and float16 weights: the factors are written
in the weights' own precision, and at break-even rank the kept triplets take about the space of
the weight itself.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .columns import column_factors, column_spectrum
from .factors import split_factors
from .records import max_saving_rank
from .spectra import Spectrum, checked_matrix, choose_method, flip_signs, gram_svd, randomized_svd
from .stats import OutputMoments, ridge
from .whiten import Whitening, whitened_product_svd, whitening


def _check_rank(rank: int, top: int, name: str) -> None:
    if not 1 <= rank <= top:
        raise ValueError(f"layer {name!r}: rank {rank} is outside [1, {top}] (the ranks this decomposition kept)")


@dataclass
class Decomposition:
    """``W ~= U_k diag(s_k) R_k`` at every rank k up to ``len(values)``.

    Attributes
    ----------
    spectrum : Spectrum
        The cost-error curve the allocator sees.
    left : ndarray (m, t)
        U_t.
    values : ndarray (t,)
        float64.
    right : ndarray (t, n)
        V_t^T for plain SVD; V_t^T S^{-1} for whitened factors.
    extra : dict
        What the report records about the decomposition (whitening method, ridge, ...).
    """

    spectrum: Spectrum
    left: np.ndarray
    values: np.ndarray
    right: np.ndarray
    extra: dict = field(default_factory=dict)

    def factors(self, rank: int, split: str = "balanced") -> tuple[np.ndarray, np.ndarray]:
        """A (m, rank), X (rank, n) in float64; ``split`` places the singular values (factors.py)."""
        _check_rank(rank, len(self.values), self.spectrum.name)
        u = self.left[:, :rank].astype(np.float64)
        r = self.right[:rank].astype(np.float64)
        return split_factors(u, self.values, r, rank, split)

    @property
    def nbytes(self) -> int:
        return int(self.left.nbytes + self.right.nbytes + self.values.nbytes)


@dataclass
class ColumnDecomposition:
    """Pivoted-QR column order of W; factors at rank k are W[:, J_k] and the least-squares T."""

    spectrum: Spectrum
    matrix: np.ndarray
    extra: dict = field(default_factory=dict)

    def factors(self, rank: int, split: str = "balanced") -> tuple[np.ndarray, np.ndarray]:
        _check_rank(rank, len(self.spectrum.singular_values), self.spectrum.name)
        a, x, _ = column_factors(self.matrix.astype(np.float64), rank)
        return a, x

    @property
    def nbytes(self) -> int:
        return int(self.matrix.nbytes)


def _store_dtype(dtype: str):
    return np.float64 if dtype == "float64" else np.float32


class PlainSvd:
    """Truncated SVD of the weights; exact, or randomized only where that pays (see
    :func:`spectra.choose_method`), the choice recorded in the spectrum."""

    name = "svd"
    needs_calibration = False

    def __init__(self, svd: str = "auto", seed: int = 0, oversampling: int = 10, power_iterations: int = 2):
        self.svd, self.seed, self.oversampling, self.power_iterations = svd, seed, oversampling, power_iterations

    def decompose(self, name: str, matrix: np.ndarray, *, dtype: str = "float32", moments=None) -> Decomposition:
        matrix = checked_matrix(name, matrix)
        m, n = matrix.shape
        top = max(max_saving_rank(m, n), 1)
        total = float(np.sum(matrix * matrix))
        how = choose_method((m, n), self.svd, top, self.oversampling)
        if how == "randomized":
            u, s, vt = randomized_svd(matrix, min(top, m, n), oversampling=self.oversampling,
                                      power_iterations=self.power_iterations, seed=self.seed)
            spectrum = Spectrum(name, (m, n), s, total, "randomized", self.seed, self.oversampling,
                                self.power_iterations)
        else:
            u, s, vt = gram_svd(matrix)
            spectrum = Spectrum(name, (m, n), s, total, "exact")
        keep = _store_dtype(dtype)
        return Decomposition(spectrum, np.ascontiguousarray(u[:, :top], dtype=keep), s[:top].copy(),
                             np.ascontiguousarray(vt[:top], dtype=keep))


class Whitened:
    """Whitened truncation on calibration inputs: SVD of W S once, factors ``U_k Σ_k (V_k^T S^{-1})``.
    The spectrum's total is ``||W S||_F^2`` (the layer's output energy on the calibration set), so
    the allocator's normalized errors are relative output errors."""

    name = "whitened"
    needs_calibration = True

    def __init__(self, ridge: float = 0.01):
        self.ridge = ridge

    def decompose(self, name: str, matrix: np.ndarray, *, dtype: str = "float32", moments=None,
                  ridge_value: float | None = None, prior=None) -> Decomposition:
        """``ridge_value`` overrides the method's relative ridge for this layer (shrinkage);
        ``prior`` (stats.Prior) is what the ridge adds instead of a multiple of the identity."""
        if moments is None:
            raise ValueError(f"layer {name!r}: whitened factors need the calibration moments of its inputs")
        alpha = self.ridge if ridge_value is None else ridge_value
        matrix = checked_matrix(name, matrix)
        if isinstance(moments, OutputMoments):  # a layer too wide for its input Gram (calibrate.py)
            dec = self.from_left_gram(name, matrix, moments.left_gram(alpha), dtype=dtype, method="output-moment")
            dec.extra["whitening"]["ridge"] = alpha
            return dec
        if matrix.shape[0] <= matrix.shape[1]:
            dec = self.decompose_left(name, matrix, ridge(moments, alpha, prior=prior, base=self.ridge), dtype=dtype)
        else:
            s = whitening(ridge(moments, alpha, prior=prior, base=self.ridge))
            dec = self.decompose_whitened(name, matrix, s, dtype=dtype)
        dec.extra["whitening"]["ridge"] = alpha
        if prior is not None and alpha > self.ridge:
            dec.extra["whitening"]["ridge_toward"] = "input statistics"
        return dec

    @staticmethod
    def decompose_left(name: str, matrix: np.ndarray, gram: np.ndarray, *, dtype: str = "float32") -> Decomposition:
        """Without any square root of G, for m <= n: (W S)(W S)^T = W G W^T (m x m), so its
        eigenvectors are the left singular vectors U of W S and the optimal rank-k map is
        [W S]_k S^{-1} = U_k U_k^T W, a projection of W's columns (no Cholesky, no solves; a
        singular G needs no floor). Same factors as :meth:`decompose_whitened` in exact arithmetic."""
        return Whitened.from_left_gram(name, matrix, (matrix @ gram) @ matrix.T, dtype=dtype)  # W G W^T (m, m)

    @staticmethod
    def from_left_gram(name: str, matrix: np.ndarray, left_gram: np.ndarray, *, dtype: str = "float32",
                       method: str = "left-gram") -> Decomposition:
        """The decomposition from ``W G W^T`` (m x m) alone: U from its eigenvectors, singular
        values of W S from its eigenvalues, factors U_k and U_k^T W."""
        m, n = matrix.shape
        top = max(max_saving_rank(m, n), 1)
        vals, vecs = np.linalg.eigh((left_gram + left_gram.T) / 2.0)
        vals, u = np.maximum(vals[::-1], 0.0), vecs[:, ::-1]
        s = np.sqrt(vals)
        u, _ = flip_signs(u, u.T)
        small = s[:top] <= np.finfo(np.float64).eps * max(m, n) * (s[0] if len(s) else 0.0)
        right = (u[:, :top].T @ matrix) / np.where(small, 1.0, s[:top])[:, None]  # (t, n): diag(1/s) U^T W
        right[small] = 0.0  # no energy in that direction: nothing to divide
        keep = _store_dtype(dtype)
        spectrum = Spectrum(name, (m, n), s, float(np.sum(vals)), "exact")
        extra = {"whitening": {"method": method, "floor": 0.0, "clamped": 0}}
        return Decomposition(spectrum, np.ascontiguousarray(u[:, :top], dtype=keep), s[:top].copy(),
                             np.ascontiguousarray(right, dtype=keep), extra)

    @staticmethod
    def decompose_whitened(name: str, matrix: np.ndarray, wh: Whitening, *, dtype: str = "float32") -> Decomposition:
        """The decomposition of ``matrix`` under a given whitening."""
        return Whitened.decompose_product(name, np.asarray(matrix, dtype=np.float64) @ wh.s, wh, dtype=dtype)

    @staticmethod
    def decompose_product(name: str, ws: np.ndarray, wh: Whitening, *, dtype: str = "float32") -> Decomposition:
        """The decomposition from an already formed whitened product ``W S`` (m, n) (sequential
        refits form ``M S'`` directly, see :func:`whiten.regression_product`)."""
        m, n = ws.shape
        top = max(max_saving_rank(m, n), 1)
        u, s, vt = whitened_product_svd(ws)
        total = float(np.sum(s * s))  # all of W S's singular values: ||W S||_F^2
        keep = _store_dtype(dtype)
        right = wh.right_inverse(vt[:top])  # (t, n): the split scales rows of V^T, so S^{-1} can come first
        spectrum = Spectrum(name, (m, n), s, total, "exact")
        extra = {"whitening": {"method": wh.method, "floor": wh.floor, "clamped": wh.clamped}}
        return Decomposition(spectrum, np.ascontiguousarray(u[:, :top], dtype=keep), s[:top].copy(),
                             np.ascontiguousarray(right, dtype=keep), extra)


class Columns:
    """Column-pivoted QR: the spectrum is the energy each pivot removes."""

    name = "columns"
    needs_calibration = False

    def decompose(self, name: str, matrix: np.ndarray, *, dtype: str = "float32", moments=None) -> ColumnDecomposition:
        matrix = checked_matrix(name, matrix)
        top = max(max_saving_rank(*matrix.shape), 1)
        return ColumnDecomposition(column_spectrum(name, matrix, top), matrix.astype(_store_dtype(dtype)))


def row_weighted(method, name: str, matrix: np.ndarray, scale, *, dtype: str = "float32", moments=None,
                 scaled_by: str | None = None, ridge_value: float | None = None, prior=None):
    """Decompose ``diag(d) W`` and map it back, ``A = diag(1/d) U_k ...``: the truncation then minimises
    the error after a per-row scale ``d`` (an eval-mode BatchNorm's ``|gamma|/sqrt(var+eps)`` that
    reads the layer's output), with the same factor shapes and no extra cost. Rows that BatchNorm
    scales to nothing get a floor of 1e-6 of the largest scale, so the map back stays finite.
    ``scale=None`` (or a method that keeps actual columns) decomposes ``W`` itself."""
    extra = {"ridge_value": ridge_value, "prior": prior} if isinstance(method, Whitened) else {}
    if scale is None or not isinstance(method, (PlainSvd, Whitened)):
        return method.decompose(name, matrix, dtype=dtype, moments=moments, **extra)
    d = floored_scale(scale)
    dec = method.decompose(name, checked_matrix(name, matrix) * d[:, None], dtype=dtype, moments=moments, **extra)
    return unscale_rows(dec, d, scaled_by)


def floored_scale(scale) -> np.ndarray:
    """Row scales with a floor of 1e-6 of the largest, so dividing by them stays finite."""
    d = np.asarray(scale, dtype=np.float64)
    return np.maximum(d, 1e-6 * float(d.max()) if d.size and d.max() > 0 else 1.0)


def unscale_rows(dec: Decomposition, d: np.ndarray, scaled_by: str | None) -> Decomposition:
    dec.left = np.ascontiguousarray(dec.left / d[:, None].astype(dec.left.dtype), dtype=dec.left.dtype)
    dec.extra["row_weights"] = scaled_by or "given"
    return dec


def with_plan_spectrum(factors: Decomposition, plan: Decomposition) -> Decomposition:
    """``factors``' factors at every rank, ``plan``'s spectrum for the allocator and the report:
    a prior on a layer's inputs changes which rank-k factors it gets, never the ranks. Planning on
    the prior-weighted energies misleads the allocator: a positive activation's mean puts most of
    a layer's energy in one direction ``W mu``, so a low rank looks almost free (EfficientNet-Lite0
    without data at params=0.9: 21.2% top-class agreement planned that way; 81.8% with the plan
    read from the weights, 77.0% plain; measured)."""
    return Decomposition(plan.spectrum, factors.left, factors.values, factors.right,
                         {**plan.extra, "input_statistics": True})


METHODS = {"svd": PlainSvd, "whitened": Whitened, "columns": Columns}


def make(name: str, config) -> PlainSvd | Whitened | Columns:
    """The method called ``name`` with its settings from a :class:`CompressConfig`."""
    if name == "svd":
        return PlainSvd(config.svd, config.seed, config.oversampling, config.power_iterations)
    if name == "whitened":
        return Whitened(config.ridge)
    if name == "columns":
        return Columns()
    raise ValueError(f"unknown method {name!r}; expected one of {', '.join(METHODS)}")
