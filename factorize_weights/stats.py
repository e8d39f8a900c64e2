"""Calibration statistics, accumulated row block by row block into fixed-size sums.

A backend yields the inputs a layer sees as rows of its matrix view's input space ((rows, in) for
a linear layer, unfolded patches (rows, in_channels*kh*kw) for a convolution); everything done
with the rows lives here, once. Memory is the accumulators (n x n per layer), never the samples.

Precision: the backends hand over rows in the model's own precision (float32), and each product
of a row block is formed in that precision, over at most :data:`PRODUCT_ROWS` rows at a time (the
BLAS runs at float32 speed, about twice float64's), while every running sum is float64. The
rounding of one product is bounded by PRODUCT_ROWS x 2^-24 (5e-4) of the diagonal it sits next to
in the worst case and is near sqrt(PRODUCT_ROWS) x 2^-24 (5e-6) in practice (Higham, "Accuracy and
Stability of Numerical Algorithms", 2nd ed., section 3.1, inner products), well under the 1%
relative ridge that every whitening adds; summing the products in float32 instead would let the
error grow with the whole calibration set. Rows given as float64 (the tests, a float64 model) are
multiplied in float64. Eigendecompositions, ridges and solves are float64 throughout.
"""

from __future__ import annotations

import numpy as np

#: Rows per float32 product before it is added to the float64 sums (see the module docstring).
PRODUCT_ROWS = 8192


def _rows(rows) -> np.ndarray:
    """Rows as float32 or float64 as given (anything narrower becomes float32)."""
    r = np.asarray(rows)
    return r if r.dtype in (np.float32, np.float64) else r.astype(np.float32)


def _product(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``a^T b`` (float64), formed in the rows' precision over PRODUCT_ROWS rows at a time."""
    out = None
    for start in range(0, max(a.shape[0], 1), PRODUCT_ROWS):
        part = (a[start:start + PRODUCT_ROWS].T @ b[start:start + PRODUCT_ROWS]).astype(np.float64, copy=False)
        out = part if out is None else out + part
    return out


def _sum_squares(a: np.ndarray, axis=None):
    return np.einsum("ij,ij->i", a, a, dtype=np.float64) if axis == 1 else float(np.einsum("ij,ij->", a, a,
                                                                                              dtype=np.float64))


class Moments:
    """``G = sum_rows x x^T`` (n x n, float64) and the number of rows.

    Examples
    --------
    >>> acc = Moments(3)
    >>> acc.add(np.ones((4, 3)))
    >>> float(acc.gram[0, 0]), acc.rows
    (4.0, 4)
    """

    def __init__(self, n: int):
        self.n = int(n)
        self.gram: np.ndarray | None = None
        self.rows = 0
        self.fourth = 0.0  # sum of ||x||^4 over the rows (Ledoit-Wolf shrinkage needs it)

    def add(self, rows: np.ndarray) -> None:
        """Add a block of rows (r, n); products in the rows' precision, sums in float64."""
        r = _rows(rows)
        if r.ndim != 2 or r.shape[1] != self.n:
            raise ValueError(f"expected rows of width {self.n}; got shape {r.shape}")
        g = _product(r, r)  # (n, n)
        if self.gram is None:
            self.gram = g
        else:
            self.gram += g
        self.rows += r.shape[0]
        self.fourth += float(np.sum(_sum_squares(r, axis=1) ** 2))

    def shrinkage(self, prior: "Prior | None" = None) -> float:
        """Ledoit & Wolf's shrinkage intensity rho in [0, 1] for the second moment S = G / N
        (Ledoit & Wolf, "A well-conditioned estimator for large-dimensional covariance matrices",
        J. Multivariate Analysis 88, 2004; uncentred, as scikit-learn's ``assume_centered=True``):
        (1 - rho) S + rho mu I, mu = tr(S) / n, is their estimate of the true second moment. It is
        near 0 with many rows per input feature and grows when there are few.

        With a ``prior`` (a target T of mean diagonal 1), the target is mu T instead of mu I: the
        same estimator with another fixed target (Schaefer & Strimmer, "A shrinkage approach to
        large-scale covariance matrix estimation", Stat. Appl. Genet. Mol. Biol. 4, 2005); the
        sampling variance b^2 does not depend on the target, only the distance d^2 = ||S - mu T||^2."""
        if self.gram is None or self.rows == 0:
            return 0.0
        n, rows = self.n, self.rows
        s = self.gram / rows
        mu = float(np.trace(s)) / n
        s_norm2 = float(np.sum(s * s))
        if prior is None:
            d2 = s_norm2 - n * mu * mu  # ||S - mu I||_F^2
        else:
            d2 = s_norm2 - 2.0 * mu * prior.inner(s) + mu * mu * prior.norm2()
        if d2 <= 0:
            return 0.0
        b2 = max((self.fourth / rows - s_norm2) / rows, 0.0)  # (1/N^2) sum_i ||x_i x_i^T - S||_F^2
        return float(min(b2, d2) / d2)

    @property
    def nbytes(self) -> int:
        return 0 if self.gram is None else int(self.gram.nbytes)


class OutputMoments:
    """The output side of a layer's calibration statistics, for a layer too wide for its input Gram
    matrix: ``W G W^T = sum_rows (W x)(W x)^T`` (m x m, float64) and ``tr G = sum ||x||^2``, from the
    same rows as :class:`Moments`, holding m^2 numbers instead of n^2.

    With m <= n the whitened truncation needs nothing else: (W S)(W S)^T = W G W^T, so its
    eigenvectors are the left singular vectors of W S and the optimal rank-k map is the projection
    U_k U_k^T W (the response PCA of Zhang et al., "Accelerating Very Deep Convolutional Networks
    for Classification and Detection", TPAMI 2016), equal to the input-side factors whenever G is
    non-singular. The ridge a G + a mu I adds a mu W W^T here (mu = tr G / n)."""

    def __init__(self, weight: np.ndarray):
        self.w = np.asarray(weight)  # (m, n): the layer's matrix view, in its own precision (no copy)
        self.n = int(self.w.shape[1])
        self.gram: np.ndarray | None = None  # (m, m)
        self.rows = 0
        self.trace = 0.0

    def add(self, rows: np.ndarray) -> None:
        """Add a block of input rows (r, n)."""
        r = _rows(rows)
        if r.ndim != 2 or r.shape[1] != self.n:
            raise ValueError(f"expected rows of width {self.n}; got shape {r.shape}")
        if self.w.dtype != r.dtype:  # once: the rows' precision decides the products'
            self.w = self.w.astype(np.float64 if np.float64 in (r.dtype, self.w.dtype) else r.dtype)
        y = r @ self.w.T  # (r, m): the layer's outputs without bias
        g = _product(y, y)
        self.gram = g if self.gram is None else self.gram + g
        self.rows += r.shape[0]
        self.trace += _sum_squares(r)

    def left_gram(self, alpha: float) -> np.ndarray:
        """``W (G + alpha mu I) W^T`` with ``mu = tr G / n`` (the relative ridge of :func:`ridge`)."""
        out = self.gram.copy()
        if alpha > 0:
            w = self.w.astype(np.float64, copy=False)
            out += alpha * (self.trace / self.n) * (w @ w.T)
        return out

    def shrinkage(self, prior=None) -> float:
        """Not available on the output side (Ledoit-Wolf needs ``||G||_F``): 0, the floor decides."""
        return 0.0

    @property
    def nbytes(self) -> int:
        return 0 if self.gram is None else int(self.gram.nbytes)


class CrossMoments:
    """For paired rows x (original inputs) and x' (the inputs the compressed model produces on the
    same samples): ``C = sum x x'^T`` and ``G' = sum x' x'^T`` (both n x n, float64), and how far
    x' has moved from x (:attr:`drift`)."""

    def __init__(self, n: int):
        self.n = int(n)
        self.cross: np.ndarray | None = None
        self.gram: np.ndarray | None = None
        self.rows = 0
        self._moved = 0.0  # sum |x' - x|^2
        self._energy = 0.0  # sum |x|^2

    @property
    def drift(self) -> float:
        """``sqrt(sum |x' - x|^2 / sum |x|^2)``: 0 while no layer upstream has been replaced."""
        return relative_error(self._moved, self._energy)

    def add(self, x: np.ndarray, x_new: np.ndarray) -> None:
        x, y = _rows(x), _rows(x_new)
        if x.dtype != y.dtype:
            x, y = x.astype(np.float64), y.astype(np.float64)
        if x.shape != y.shape or x.ndim != 2 or x.shape[1] != self.n:
            raise ValueError(f"expected two row blocks of width {self.n} and equal shape; got {x.shape}, {y.shape}")
        c, g = _product(x, y), _product(y, y)
        self._moved += _sum_squares(y - x)
        self._energy += _sum_squares(x)
        if self.cross is None:
            self.cross, self.gram = c, g
        else:
            self.cross += c
            self.gram += g
        self.rows += x.shape[0]


class Prior:
    """A layer's expected input second moment up to scale, ``T = diag(var) + mean mean^T`` with
    mean diagonal 1, kept as two vectors (never n x n until it is added to a matrix): the target
    the calibration moments shrink toward where the inputs' statistics are known without data
    (an eval-mode BatchNorm's), and without data the moment the layer is truncated for."""

    def __init__(self, mean: np.ndarray, var: np.ndarray):
        mean, var = np.asarray(mean, dtype=np.float64), np.asarray(var, dtype=np.float64)
        scale = float(np.mean(var + mean * mean))
        if not scale > 0:
            raise ValueError("a prior needs a positive mean diagonal")
        self.mean, self.var = mean / np.sqrt(scale), var / scale

    @classmethod
    def from_stats(cls, stats) -> "Prior | None":
        """From per-channel ``(mean, variance, taps)``, each channel repeated over its taps; None
        when the statistics promise an all-zero input (nothing to shrink toward)."""
        mean, var, taps = stats
        ones = np.ones(int(taps))
        mean, var = np.kron(mean, ones), np.kron(var, ones)
        return cls(mean, var) if float(np.mean(var + mean * mean)) > 0 else None

    def matrix(self) -> np.ndarray:
        """``T`` itself (n x n): the second moment a layer is truncated for when there is no data.
        The means are in: a positive activation's mean is part of what the next layer sees
        (EfficientNet-Lite0 without data, the plan held fixed: 81.8/61.8% top-class agreement at
        params=0.9/0.8 with them, 80.2/56.2% centred; measured)."""
        return self.add_to(np.zeros((len(self.mean), len(self.mean))), 1.0)

    def add_to(self, matrix: np.ndarray, scale: float) -> np.ndarray:
        """``matrix + scale * T`` (a new array)."""
        out = matrix + scale * np.outer(self.mean, self.mean)
        out[np.diag_indices_from(out)] += scale * self.var
        return out

    def inner(self, s: np.ndarray) -> float:
        """``<S, T>_F``."""
        return float(np.dot(self.var, np.diag(s)) + self.mean @ s @ self.mean)

    def norm2(self) -> float:
        """``||T||_F^2``."""
        mm = self.mean * self.mean
        return float(np.sum(self.var ** 2) + 2.0 * np.dot(self.var, mm) + np.sum(mm) ** 2)


def shrinkage_ridge(rho: float, floor: float) -> float:
    """The relative ridge equal to Ledoit-Wolf shrinkage ``rho``: (1 - rho) S + rho mu I is
    proportional to S + rho / (1 - rho) mu I (scale does not change whitened factors); at least
    ``floor``, at most 1e6 (rho -> 1: the factors tend to the plain SVD's)."""
    alpha = rho / (1.0 - rho) if rho < 1.0 else 1e6
    return float(min(max(alpha, floor), 1e6))


def ridge(matrix: np.ndarray, alpha: float, reference: np.ndarray | None = None,
          prior: Prior | None = None, base: float = 0.0) -> np.ndarray:
    """``matrix + alpha * mean(diag(reference)) * I``: a relative ridge (common practice, e.g. 1%
    of the mean input energy) that keeps directions the calibration set never visits. With a
    ``prior``, the first ``base`` of ``alpha`` stays on the identity (every direction keeps that
    floor, whatever the prior says) and the rest of it adds ``T`` (the directions the prior
    expects)."""
    if alpha <= 0:
        return matrix
    ref = matrix if reference is None else reference
    unit = float(np.mean(np.diag(ref)))
    if prior is None:
        return matrix + alpha * unit * np.eye(matrix.shape[0])
    floor = min(alpha, max(base, 0.0))
    out = prior.add_to(matrix, (alpha - floor) * unit) if alpha > floor else matrix.copy()
    out[np.diag_indices_from(out)] += floor * unit
    return out


def relative_error(sum_sq_diff: float, sum_sq_ref: float) -> float:
    """``sqrt(sum |f - g|^2 / sum |f|^2)``, 0 when the reference is all zero."""
    return float(np.sqrt(sum_sq_diff / sum_sq_ref)) if sum_sq_ref > 0 else 0.0


def weight_error(w: np.ndarray, a: np.ndarray, x: np.ndarray) -> float:
    """Measured ``||W - A X||_F / ||W||_F`` of a factor pair (0 for an all-zero W)."""
    norm = np.linalg.norm(w)
    return float(np.linalg.norm(w - a @ x) / norm) if norm > 0 else 0.0
