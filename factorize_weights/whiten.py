"""Calibrated (whitened) truncation: factors that are optimal for the layer's *outputs* on real
inputs, not for its weights.

With calibration inputs as the columns of X (n x N) and their second moment G = X X^T = S S^T,
``||(W - W') X||_F = ||(W - W') S||_F`` for any W'. So the rank-k W' minimising the output error
is the truncated SVD of W S mapped back: W S = U Sigma V^T, W' = U_k Sigma_k V_k^T S^{-1}, and the
error is exactly sqrt(sum_{i>k} sigma_i(W S)^2) (Eckart-Young applied to W S; the truncation-aware
data whitening of Wang et al., "SVD-LLM", arXiv 2403.07378, 2024).

Sequential calibration fits a layer to the *original* outputs from the inputs X' that the already
compressed layers upstream now produce: min over rank k of ||W X - W' X'||_F is reduced-rank
regression, M = W X X'^T (X' X'^T)^{-1} and W' = [M S']_k S'^{-1} with S' S'^T = X' X'^T.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from scipy.linalg import solve_triangular

from .spectra import gram_svd

#: Relative eigenvalue floor of the fallback: eigenvalues below FLOOR x the largest are
#: raised to it. Small enough not to change a well-conditioned problem, large enough that S^{-1}
#: stays finite in float64 (machine epsilon 2.2e-16; its square root ~1.5e-8).
FLOOR = 1e-8

#: Cholesky is trusted while min(diag L)^2 / max(diag L)^2 stays above this.
CHOLESKY_MIN_RATIO = 1e-12


@dataclass
class Whitening:
    """A square root S of a Gram matrix G (S S^T = G, up to the recorded floor). S^{-1} is never
    formed: products with it are triangular solves (Cholesky) or a diagonal scaling of the
    eigenvectors (damped fallback), n^2 per row instead of a general n x n inverse.

    Attributes
    ----------
    s : ndarray (n, n)
        Lower-triangular for ``"cholesky"``; ``Q diag(sqrt(lambda))`` for ``"eigh-damped"``.
    method : str
        ``"cholesky"`` or ``"eigh-damped"``.
    floor : float
        The eigenvalue floor that was applied (0.0 for Cholesky).
    clamped : int
        How many eigenvalues were raised to the floor (a dead input feature shows here).
    """

    s: np.ndarray
    method: str
    floor: float = 0.0
    clamped: int = 0
    _root: np.ndarray | None = None  # eigh-damped: sqrt of the floored eigenvalues

    def right_inverse(self, y: np.ndarray) -> np.ndarray:
        """``Y S^{-1}`` for Y (k, n)."""
        if self.method == "cholesky":  # Z S = Y  <=>  S^T Z^T = Y^T
            return solve_triangular(self.s, np.asarray(y).T, lower=True, trans="T").T
        q = self.s / self._root  # S = Q diag(r), S^{-1} = diag(1/r) Q^T
        return (np.asarray(y) / self._root) @ q.T

    def right_inverse_transposed(self, y: np.ndarray) -> np.ndarray:
        """``Y S^{-T}`` for Y (k, n)."""
        if self.method == "cholesky":  # Z S^T = Y  <=>  S Z^T = Y^T
            return solve_triangular(self.s, np.asarray(y).T, lower=True).T
        q = self.s / self._root  # S^{-T} = Q diag(1/r)
        return (np.asarray(y) @ q) / self._root



def whitening(gram: np.ndarray, *, floor: float = FLOOR) -> Whitening:
    """S with S S^T = G: Cholesky when G is well conditioned, else a damped eigendecomposition."""
    gram = np.asarray(gram, dtype=np.float64)
    n = gram.shape[0]
    if gram.shape != (n, n) or not np.isfinite(gram.sum()):  # one pass: a NaN or Inf makes the sum one
        raise ValueError(f"Gram matrix must be a finite square matrix; got shape {gram.shape}")
    try:  # Cholesky reads the lower triangle only; eigh below does too (UPLO="L")
        low = np.linalg.cholesky(gram)
        d = np.abs(np.diag(low))
        if d.min() ** 2 > CHOLESKY_MIN_RATIO * d.max() ** 2:
            return Whitening(low, "cholesky")
    except np.linalg.LinAlgError:
        pass
    vals, vecs = np.linalg.eigh(gram)
    top = max(float(vals.max()), 0.0)
    floor = floor * top if top > 0 else 1.0
    clamped = int(np.sum(vals < floor))
    vals = np.maximum(vals, floor)
    root = np.sqrt(vals)
    return Whitening(vecs * root, "eigh-damped", floor, clamped, root)


def whitened_product_svd(ws: np.ndarray):
    """U, sigma, Vt of an already formed whitened product (float64, signs fixed)."""
    return gram_svd(ws)


def regression_product(matrix: np.ndarray, cross: np.ndarray, gram_new: Whitening) -> np.ndarray:
    """M S' for the reduced-rank regression target M = W C G'^{-1} (C = X X'^T, G' = S' S'^T):
    since G'^{-1} S' = S'^{-T}, M S' = W C S'^{-T}, formed without any inverse."""
    return gram_new.right_inverse_transposed(np.asarray(matrix, dtype=np.float64) @ cross)

