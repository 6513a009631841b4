"""Integer kernels: what an int8 MCU kernel computes for each quantized operator, in numpy.

One file per operator family (conv, gemm, elementwise, pool, movement). Each family registers, per
ONNX op type, a *builder*: given the node, what its inputs are (`Operand`: an integer activation, an
integer constant such as int8 weights or an int32 bias, a float constant, or absent) and the integer
grid of each output (`Grid`, already narrowed by a fused ReLU/ReLU6 clamp), it prepares the
constants once (centred weights, int32 bias, fixed-point multipliers and shifts) and returns a
`Prepared` whose `run` maps the input integers of one batch to the output integers. A builder returns
None when it cannot run the node in integers (the evaluator then runs the node in float between a
dequantize and a quantize, as a device runs a float kernel).

Kernels sit in the operator layer and import nothing above it: the fixed-point arithmetic (qfit.quant.
fixed_point) and single-node float sessions used to sum exact products reach them through the
`Arithmetic` object the evaluator (qfit.measure.integer) passes in.
"""
from __future__ import annotations

from qfit.ops.kernels.common import (FLOAT32_EXACT, FLOAT64_EXACT, INT32_LIMIT, Arithmetic, Builder,  # noqa: F401
                                     Grid, Operand, Prepared, centred_float, channel_shape,
                                     requantization_record, saturate_accumulator)
from qfit.ops.registry import lookup


def kernel_for(op_type: str) -> Builder | None:
    """The integer kernel builder of `op_type` (the registry's `integer_kernel`), or None: the node
    runs in float."""
    return lookup(op_type).integer_kernel
