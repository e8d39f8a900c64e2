"""Column-based factors: W (m x n) ~= W[:, J] @ T with J k actual columns of W.

J is chosen by column-pivoted QR (Businger & Golub 1965): at each step the column with the largest
norm orthogonal to those already chosen. T is the least-squares fit of W on those columns, so
W[:, J] T is the projection of W onto their span. This is an interpolative decomposition: cheaper
to explain (the expand factor is made of original weight columns) and never better than the
truncated SVD at the same rank in Frobenius error (Eckart-Young).
"""

from __future__ import annotations

import numpy as np

from .spectra import Spectrum


def pivoted_qr_columns(matrix: np.ndarray, rank: int) -> tuple[np.ndarray, np.ndarray]:
    """The first ``rank`` pivot columns and the residual energy removed at each step.

    Returns
    -------
    columns : ndarray of int (rank,)
    removed : ndarray (rank,)
        ``||R_{j-1}||_F^2 - ||R_j||_F^2``: the squared Frobenius error that choosing column j removes.
    """
    a = np.array(matrix, dtype=np.float64)  # residual, deflated in place
    m, n = a.shape
    rank = min(rank, m, n)
    norms = np.sum(a * a, axis=0)
    columns, removed = [], []
    for _ in range(rank):
        norms[columns] = -1.0
        j = int(np.argmax(norms))
        if norms[j] <= 1e-300:  # W is exhausted (rank-deficient): any unused column adds nothing
            columns.append(int(np.flatnonzero(norms >= 0)[0]) if np.any(norms >= 0) else j)
            removed.append(0.0)
            continue
        q = a[:, j] / np.sqrt(norms[j])  # (m,)
        before = float(np.sum(norms[norms > 0]))
        a -= np.outer(q, q @ a)  # project every column off q
        norms = np.sum(a * a, axis=0)
        columns.append(j)
        norms[columns] = -1.0
        removed.append(before - float(np.sum(norms[norms > 0])))
    return np.asarray(columns, dtype=int), np.maximum(np.asarray(removed), 0.0)


def column_spectrum(name: str, matrix: np.ndarray, top: int) -> Spectrum:
    """A Spectrum whose "singular values" are sqrt(energy removed per pivot step), so the allocator
    sees the column method's own error curve (``||W - W[:, J_k] T_k||_F^2 = total - sum``)."""
    matrix = np.asarray(matrix, dtype=np.float64)
    _, removed = pivoted_qr_columns(matrix, max(top, 1))
    return Spectrum(name, tuple(matrix.shape), np.sqrt(removed), float(np.sum(matrix * matrix)), "pivoted-qr")


def column_factors(matrix: np.ndarray, rank: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """A = W[:, J] (m, k), X = T (k, n) by least squares, and the chosen columns J."""
    matrix = np.asarray(matrix, dtype=np.float64)
    m, n = matrix.shape
    if not 1 <= rank <= min(m, n):
        raise ValueError(f"rank {rank} is outside [1, min(out, in) = {min(m, n)}]")
    cols, _ = pivoted_qr_columns(matrix, rank)
    a = matrix[:, cols]
    t, *_ = np.linalg.lstsq(a, matrix, rcond=None)
    return a, t, cols
