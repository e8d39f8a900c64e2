"""PyTorch backend: find layers, hand out matrix views, rewrite into factor pairs, run, save.

The only package that imports ``torch.nn`` for the core job. The numeric core receives float64
numpy matrices from :func:`weight_matrix` and gives back numpy factors to :func:`rewrite`. One
concern per file:

- ``loading``   factories, model folders and checkpoints (safetensors, sharded, wrapped .pt)
- ``layers``    discovery (what can be split, and why not), matrix views, the rewrite, rebuild
- ``running``   inputs as tensors, the output the metrics read, inference, timing, ONNX export
- ``probes``    one forward pass on a sample: positions, activation size, overridden forward()
                checks, BatchNorm row scales and input statistics; call order of the layers
- ``paired``    layer inputs for calibration, one model or two side by side; replacement errors
- ``attention`` ``nn.MultiheadAttention`` as four splittable projections
- ``recovery``  fine-tuning of the factor pairs
- ``layer_timing`` each layer's input shape, and its dense and factorized forms run alone (latency)
"""

from __future__ import annotations

from .layers import (  # noqa: F401
    OVERRIDE_MISMATCH, OVERRIDE_REASON, FactorPair, count_params, weight_dtype, discover, load_saved_weights, normalize, rebuild,
    rewrite, save_weights, skeleton, weight_matrix,
)
from .layer_timing import input_shapes, layer_timers  # noqa: F401
from .loading import (  # noqa: F401
    NESTED_KEYS, CheckpointNotice, ShardedCheckpoint, build_model, load_factory, load_pretrained, load_weights,
    read_checkpoint,
)
from .paired import (  # noqa: F401
    UNFOLD_CHUNK_BYTES, PairedRuns, find_chain, layer_rows, paired_runs, replacement_errors, stream_inputs,
    stream_layer_outputs, stream_paired_inputs,
)
from .probes import (  # noqa: F401
    LIVE_OUTPUTS, OVERRIDE_TOLERANCE, TRACE_WINDOW, _trace_normalized_inputs, activation_moments, call_stages,
    measure_positions,
)
from .recovery import fine_tune_factors as recover  # noqa: F401
from .running import (  # noqa: F401
    call, check, export_onnx, factor_parameters, first_rows, inference, predict, read_factors, rows,
    save_model, select_output, timer, timing, to_tensor,
)

FORMAT = "torch"
NAME = "PyTorch"  # in messages
RUNTIME = "torch"  # what latency is measured in

#: What this backend can do beyond the common interface (the resolver refuses from this table).
CAPABILITIES = frozenset({
    "output_effects",  # replacement_errors: probe one layer's factors at the model's output
    "recovery",  # recover: fine-tune the factor pairs
    "bn_statistics",  # BatchNorm row weights and promised input statistics
    "export_onnx",  # export_onnx: the rewritten model as an ONNX graph
})
