"""Backend-neutral description of one factorizable layer.

A backend (PyTorch today, ONNX later) turns each dense linear or convolution layer it finds into a
:class:`LayerRecord`. Everything downstream (spectra, allocator, reports) reads only these records
and plain numpy matrices; it never touches the backend's module or graph objects.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any


@dataclass
class LayerRecord:
    """One linear or convolution layer, seen as a matrix.

    Attributes
    ----------
    name : str
        Qualified name in the model (``"features.3"``).
    kind : str
        ``"linear"``, ``"conv1d"`` or ``"conv2d"``.
    weight_shape : tuple of int
        The weight tensor's shape as stored (``(out, in)`` or ``(out, in, kh, kw)``).
    matrix_shape : tuple of int
        ``(m, n)`` of the matrix view: ``(out, in)`` for a linear layer,
        ``(out_channels, in_channels * kh * kw)`` for a convolution.
    has_bias : bool
    dtype : str
        The weight dtype as the backend names it (``"float32"``).
    options : dict
        Geometry a rewrite must preserve (stride, padding, dilation, padding mode).
    skip_reason : str or None
        Why this layer will not be factorized; ``None`` when it is a candidate.
    handle : Any
        The backend's own object for this layer (a module); never read by the numeric core.
    positions : int or None
        Output positions per sample (1 for linear layers, output length/area for convolutions)
        once measured on a sample input; FLOPs = multiply-adds per position x positions.
    backend : str
        ``"torch"`` or ``"onnx"``: which backend made the record (and can read its weight).
    calls : int or None
        How often one forward pass calls the layer, once measured (sequential refits stop a pass
        when every layer they fit has run that often).
    """

    name: str
    kind: str
    weight_shape: tuple[int, ...]
    matrix_shape: tuple[int, int]
    has_bias: bool
    dtype: str
    options: dict[str, Any] = field(default_factory=dict)
    skip_reason: str | None = None
    handle: Any = field(default=None, repr=False, compare=False)
    positions: int | None = None
    backend: str = "torch"
    calls: int | None = None
    # per-output-row weights of the error (|gamma| / sqrt(var + eps) of an eval-mode BatchNorm that
    # reads this layer's output directly), and that normalization's name; None: unweighted
    row_scale: Any = field(default=None, repr=False, compare=False)
    scaled_by: str | None = None
    # a call giving (mean and variance per input channel, kernel taps) from the eval-mode BatchNorm (and
    # elementwise activation) that produce the layer's input; see torch_backend._trace_normalized_inputs
    input_stats: Any = field(default=None, repr=False, compare=False)
    input_from: str | None = None

    @property
    def weight_params(self) -> int:
        m, n = self.matrix_shape
        return m * n

    @property
    def bias_params(self) -> int:
        return self.matrix_shape[0] if self.has_bias else 0

    @property
    def params(self) -> int:
        """Parameters of the dense layer (weight plus bias)."""
        return self.weight_params + self.bias_params

    def factorized_params(self, rank: int | None) -> int:
        """Parameters after a rank-``rank`` split (``None`` means the layer stays dense)."""
        if rank is None:
            return self.params
        m, n = self.matrix_shape
        return rank * (m + n) + self.bias_params


def break_even_rank(m: int, n: int) -> int:
    """``floor(m*n / (m+n))``: at or above this rank two factors save nothing.

    A rank-k split of an m x n matrix stores k*(m+n) numbers against m*n (derivable: the first factor
    is k x n, the second m x k), so it saves only while k < m*n/(m+n).
    """
    if m < 1 or n < 1:
        raise ValueError(f"matrix shape must be positive; got ({m}, {n})")
    return (m * n) // (m + n)


def max_saving_rank(m: int, n: int) -> int:
    """The largest rank the tool will factorize at: one below the break-even rank (may be 0)."""
    return max(break_even_rank(m, n) - 1, 0)
