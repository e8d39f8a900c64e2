"""Two thin factors of a layer matrix: W (m x n) ~= A (m x k) @ X (k x n).

The truncated SVD gives the best rank-k approximation in the Frobenius and spectral norms
(Eckart & Young 1936; Mirsky 1960). How the singular values are split between the two factors does
not change the product; we use the *balanced* split A = U_k sqrt(S_k), X = sqrt(S_k) V_k^T so both
factors have the same scale. That keeps each factor's entries in the range of the original weights
(helpful in float16/int8 and for any later fine-tuning, where an unbalanced pair trains badly);
``split="left"`` puts all of S_k into A (A = U_k S_k, X = V_k^T) for callers who want X orthonormal.
"""

from __future__ import annotations

import numpy as np

from .spectra import exact_svd, randomized_svd

SPLITS = ("balanced", "left")


def svd_factors(
    matrix: np.ndarray,
    rank: int,
    *,
    split: str = "balanced",
    svd: str = "exact",
    seed: int = 0,
    oversampling: int = 10,
    power_iterations: int = 2,
) -> tuple[np.ndarray, np.ndarray]:
    """Rank-``rank`` factors of ``matrix`` from its truncated SVD.

    Parameters
    ----------
    matrix : ndarray of shape (m, n)
    rank : int
        ``1 <= rank <= min(m, n)``.
    split : {"balanced", "left"}
        Where the singular values go (see the module docstring).
    svd : {"exact", "randomized"}
        How the top singular triplets are computed; randomized takes ``seed``, ``oversampling``
        and ``power_iterations`` (Halko, Martinsson & Tropp 2011).

    Returns
    -------
    A : ndarray of shape (m, rank), float64
    X : ndarray of shape (rank, n), float64
        ``A @ X`` is the rank-``rank`` truncated SVD of ``matrix``.
    """
    matrix = np.asarray(matrix, dtype=np.float64)
    m, n = matrix.shape
    if not 1 <= rank <= min(m, n):
        raise ValueError(f"rank {rank} is outside [1, min(out, in) = {min(m, n)}]")
    if split not in SPLITS:
        raise ValueError(f"split must be one of {', '.join(SPLITS)}; got {split!r}")
    if svd == "randomized":
        u, s, vt = randomized_svd(
            matrix, rank, oversampling=oversampling, power_iterations=power_iterations, seed=seed
        )
    else:
        u, s, vt = exact_svd(matrix)
    return split_factors(u, s, vt, rank, split)


def split_factors(u: np.ndarray, s: np.ndarray, vt: np.ndarray, rank: int, split: str = "balanced"):
    """Rank-``rank`` factors from a thin SVD ``U diag(s) Vt`` (any number of columns >= rank).

    Returns A (m, rank) and X (rank, n) with A @ X = U_k diag(s_k) Vt_k, the singular values
    placed as ``split`` says (see the module docstring).
    """
    u, s, vt = u[:, :rank], s[:rank], vt[:rank]
    if split == "balanced":
        root = np.sqrt(s)
        return u * root, root[:, None] * vt  # (m, k), (k, n)
    return u * s, vt
