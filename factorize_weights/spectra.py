"""Singular-value spectra of layer matrices: exact and randomized SVD, energy, break-even.

Everything here works on numpy arrays only. Computation is in float64 whatever the weight dtype,
because the tail energies that drive the allocator are differences of large sums.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .records import break_even_rank, max_saving_rank

#: ``svd="auto"`` uses the randomized SVD only on matrices at least this large on their smaller side
#: (below it a full LAPACK SVD takes under a second) ...
AUTO_RANDOMIZED_MIN_SIDE = 1024
#: ... and only when the sketch (top ranks + oversampling) is at most this fraction of the smaller
#: side: the randomized SVD costs about (2q + 2) passes over the matrix with a sketch of that width,
#: so near half the smaller side it is both slower and less accurate than the exact one (measured on
#: 3072 x 768: exact thin SVD 0.4 s). Break-even menus reach at least half the smaller side, so
#: ``auto`` is exact unless the ranks that can be chosen are capped well below it.
AUTO_RANDOMIZED_MAX_FRACTION = 0.25

SVD_METHODS = ("exact", "randomized", "auto")


@dataclass
class Spectrum:
    """The singular values of one layer's matrix view and what follows from them.

    Attributes
    ----------
    name : str
    shape : tuple of int
        ``(m, n)`` of the matrix view.
    singular_values : ndarray of shape (t,)
        float64, descending. ``t = min(m, n)`` for an exact SVD; for a randomized SVD only the top
        ``t`` values the allocator can use (up to the largest saving rank).
    total_energy : float
        ``||W||_F**2``, computed exactly from the matrix (not from the singular values), so tail
        energies stay exact even when only the top values are known.
    method : str
        ``"exact"`` or ``"randomized"``.
    seed, oversampling, power_iterations
        The randomized SVD's settings (``None`` for exact).
    """

    name: str
    shape: tuple[int, int]
    singular_values: np.ndarray
    total_energy: float
    method: str = "exact"
    seed: int | None = None
    oversampling: int | None = None
    power_iterations: int | None = None

    @property
    def break_even_rank(self) -> int:
        return break_even_rank(*self.shape)

    @property
    def max_rank(self) -> int:
        """Largest rank the allocator may choose: below break-even and within the known values."""
        return min(max_saving_rank(*self.shape), len(self.singular_values))

    def kept_energy(self, rank: int | np.ndarray) -> np.ndarray | float:
        """Squared singular-value energy of the top ``rank`` components."""
        csum = np.concatenate([[0.0], np.cumsum(self.singular_values**2)])
        return csum[rank]

    def energy_fraction(self, rank):
        """Fraction of ``||W||_F**2`` kept at ``rank`` (1.0 for an all-zero matrix)."""
        if self.total_energy <= 0.0:
            return np.ones_like(np.asarray(rank), dtype=float) if np.ndim(rank) else 1.0
        return np.minimum(self.kept_energy(rank) / self.total_energy, 1.0)

    def relative_error(self, rank):
        """``||W - W_k||_F / ||W||_F`` (Eckart-Young: the root of the dropped energy)."""
        return np.sqrt(np.maximum(1.0 - self.energy_fraction(rank), 0.0))

    def energy_curve(self) -> np.ndarray:
        """Energy fraction kept at ranks 1..t."""
        return self.energy_fraction(np.arange(1, len(self.singular_values) + 1))


def checked_matrix(name: str, matrix) -> np.ndarray:
    """``matrix`` as float64; refuse a non-2-D, empty or non-finite one, naming the layer."""
    matrix = np.asarray(matrix, dtype=np.float64)
    if matrix.ndim != 2 or 0 in matrix.shape:
        raise ValueError(f"layer {name!r}: expected a non-empty 2-D matrix; got shape {matrix.shape}")
    if not np.all(np.isfinite(matrix)):
        bad = int(np.size(matrix) - np.count_nonzero(np.isfinite(matrix)))
        raise ValueError(f"layer {name!r}: weight has {bad} NaN or Inf value(s)")
    return matrix


def flip_signs(u: np.ndarray, vt: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Make the largest-magnitude entry of each left singular vector positive.

    The SVD fixes singular vectors only up to sign; fixing it makes factors repeat bit for bit
    across runs and LAPACK builds (the convention scikit-learn's ``svd_flip`` uses).
    """
    idx = np.argmax(np.abs(u), axis=0)
    signs = np.sign(u[idx, np.arange(u.shape[1])])
    signs[signs == 0] = 1.0
    return u * signs, vt * signs[:, None]


def exact_svd(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Thin SVD ``a = U diag(s) Vt`` in float64 with fixed signs.

    Shapes: ``a`` (m, n) -> U (m, r), s (r,), Vt (r, n) with r = min(m, n).
    """
    u, s, vt = np.linalg.svd(np.asarray(a, dtype=np.float64), full_matrices=False)
    u, vt = flip_signs(u, vt)
    return u, s, vt


def gram_svd(a: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Thin SVD from the eigendecomposition of the smaller Gram matrix (A^T A or A A^T), float64,
    signs fixed. Shapes as :func:`exact_svd`.

    Three to five times faster than LAPACK's divide-and-conquer SVD on the matrices of trained
    layers (measured here: 768 x 768 0.055 s against 0.17 s; 3072 x 768 0.12 s against 0.42 s).
    The squared singular values are the eigenvalues, so values below about 1e-8 of the largest are
    not resolved: they hold less than 1e-16 of the energy, which no rank choice can see. The
    truncated products ``U_k diag(s_k) V_k^T`` are exact projections of A onto the kept right (or
    left) singular vectors, whatever the accuracy of the small values: ``A V_k V_k^T``.
    """
    a = np.asarray(a, dtype=np.float64)
    m, n = a.shape
    tall = m >= n
    g = a.T @ a if tall else a @ a.T  # (r, r), r = min(m, n)
    vals, vecs = np.linalg.eigh(g)  # ascending
    vals, vecs = np.maximum(vals[::-1], 0.0), vecs[:, ::-1]
    s = np.sqrt(vals)
    # directions with (numerically) no energy: their other singular vector is set to zero instead of
    # dividing rounding noise by ~0 (which overflows in float32); the truncation stays a projection
    small = s <= np.finfo(np.float64).eps * max(m, n) * (s[0] if len(s) else 0.0)
    safe = np.where(small, 1.0, s)
    if tall:
        v = vecs
        u = (a @ v) / safe
        u[:, small] = 0.0
    else:
        u = vecs
        v = (a.T @ u) / safe
        v[:, small] = 0.0
    u, vt = flip_signs(u, v.T)
    return u, s, vt


def randomized_svd(
    a: np.ndarray,
    rank: int,
    *,
    oversampling: int = 10,
    power_iterations: int = 2,
    seed: int = 0,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Top-``rank`` SVD by randomized range finding.

    Parameters
    ----------
    a : ndarray of shape (m, n)
    rank : int
        Number of singular triplets wanted, ``1 <= rank <= min(m, n)``.
    oversampling : int
        Extra test vectors ``p``; the sketch has ``rank + p`` columns (10 is the usual default).
    power_iterations : int
        Subspace iterations ``q``; each multiplies by ``(A A^T)`` with a QR in between so that the
        small singular directions are not lost to rounding.
    seed : int
        Seed of the Gaussian test matrix; the same seed gives the same factors.

    Returns
    -------
    U (m, rank), s (rank,), Vt (rank, n), float64, signs fixed as in :func:`exact_svd`.

    Notes
    -----
    Halko, Martinsson & Tropp, "Finding structure with randomness", SIAM Review 53(2), 2011,
    Algorithms 4.4 (randomized subspace iteration) and 5.1 (direct SVD of the small matrix).
    """
    a = np.asarray(a, dtype=np.float64)
    m, n = a.shape
    if not 1 <= rank <= min(m, n):
        raise ValueError(f"rank must be in [1, {min(m, n)}] for a {m}x{n} matrix; got {rank}")
    if oversampling < 0 or power_iterations < 0:
        raise ValueError(
            f"oversampling and power_iterations must be >= 0; got {oversampling}, {power_iterations}"
        )
    width = min(rank + oversampling, min(m, n))
    rng = np.random.default_rng(seed)
    omega = rng.standard_normal((n, width))  # (n, k+p)
    q, _ = np.linalg.qr(a @ omega)  # (m, k+p): orthonormal basis of the sampled range
    for _ in range(power_iterations):
        z, _ = np.linalg.qr(a.T @ q)  # (n, k+p)
        q, _ = np.linalg.qr(a @ z)  # (m, k+p)
    b = q.T @ a  # (k+p, n): A restricted to the range
    ub, s, vt = np.linalg.svd(b, full_matrices=False)
    u = q @ ub  # (m, k+p)
    u, vt = flip_signs(u[:, :rank], vt[:rank])
    return u, s[:rank], vt


def choose_method(shape: tuple[int, int], svd: str, top: int | None = None, oversampling: int = 10) -> str:
    """Resolve ``svd="auto"`` to ``"exact"`` or ``"randomized"`` for one matrix shape whose top
    ``top`` singular triplets are needed (default: up to the largest saving rank)."""
    if svd not in SVD_METHODS:
        raise ValueError(f"svd must be one of {', '.join(SVD_METHODS)}; got {svd!r}")
    if svd != "auto":
        return svd
    side = min(shape)
    top = max_saving_rank(*shape) if top is None else top
    pays = top + oversampling <= AUTO_RANDOMIZED_MAX_FRACTION * side
    return "randomized" if side >= AUTO_RANDOMIZED_MIN_SIDE and pays else "exact"


def compute_spectrum(
    name: str,
    matrix: np.ndarray,
    *,
    svd: str = "exact",
    seed: int = 0,
    oversampling: int = 10,
    power_iterations: int = 2,
) -> Spectrum:
    """Spectrum of one matrix view (values only; :mod:`methods` keeps the vectors too).

    With ``svd="randomized"`` only the top ``max_saving_rank(m, n)`` singular values are computed:
    the allocator never chooses a rank at or above break-even, so it never needs the rest, and the
    exact ``||W||_F**2`` keeps every tail energy exact up to the randomized values' accuracy.
    """
    matrix = checked_matrix(name, matrix)
    shape = (int(matrix.shape[0]), int(matrix.shape[1]))
    total = float(np.sum(matrix * matrix))
    top = max_saving_rank(*shape)
    if choose_method(shape, svd, top, oversampling) == "randomized" and top >= 1:
        _, s, _ = randomized_svd(
            matrix, top, oversampling=oversampling, power_iterations=power_iterations, seed=seed
        )
        return Spectrum(name, shape, s, total, "randomized", seed, oversampling, power_iterations)
    s = np.linalg.svd(matrix, compute_uv=False)
    return Spectrum(name, shape, s, total, "exact")
