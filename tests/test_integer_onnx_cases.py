"""The integer kernels against the worked integer cases the onnx package ships for its own integer
operators (a peer's test suite, read from the installed package: onnx/backend/test/case/node/).

Cases used, each through qfit's kernel for the float op it quantizes:
  qlinearconv.py    QLinearConv.export                       -> Conv kernel (uint8, zero points 132/255/123)
  qlinearmatmul.py  QLinearMatMul.export_int                 -> MatMul kernel (2-D and 3-D, uint8 and int8,
                                                                float32 and float16 scales: all 8 cases)
  convinteger.py    ConvInteger.export_without_padding,
                    ConvInteger.export_with_padding          -> Conv kernel, scales 1 (the int32 sums)
  matmulinteger.py  MatMulInteger.export                     -> MatMul kernel, scales 1 (the int32 sums)
Rounding: one rounding, ties to even, as the ONNX spec's QLinear* operators round; zero points as
given (weights' too); the expected outputs must match exactly.
"""
from __future__ import annotations

import importlib

import numpy as np
import onnx
import pytest
from onnx import helper

from qfit.measure.integer import FixedPointArithmetic
from qfit.ops.kernels import Grid, Operand
from qfit.ops.kernels.conv import build_conv
from qfit.ops.kernels.gemm import build_matmul
from qfit.quant.fixed_point import SPEC_ROUNDING

OPSETS = [helper.make_opsetid("", 21)]
RANGES = {np.dtype(np.uint8): (0, 255), np.dtype(np.int8): (-128, 127), np.dtype(np.int32): (-(1 << 31), (1 << 31) - 1)}


def onnx_cases(module: str, cls: str, exports: tuple[str, ...]) -> list[tuple]:
    """(node, inputs, outputs, name) of the named export functions of one onnx test-case module."""
    found = []
    mod = importlib.import_module(f"onnx.backend.test.case.node.{module}")
    original = mod.expect
    mod.expect = lambda node, inputs, outputs, name, **_: found.append((node, inputs, outputs, name))
    try:
        for export in exports:
            getattr(getattr(mod, cls), export)()
    finally:
        mod.expect = original
    return found


def grid(scale, zero_point, dtype, axis=None) -> Grid:
    low, high = RANGES[np.dtype(dtype)]
    scale = np.asarray(scale, np.float64)
    zero = np.asarray(zero_point, np.int64)
    per_channel = scale.size > 1 or zero.size > 1
    if per_channel:
        size = max(scale.size, zero.size)
        scale, zero = np.broadcast_to(scale.reshape(-1), (size,)), np.broadcast_to(zero.reshape(-1), (size,))
    return Grid(scale.reshape(-1) if per_channel else scale.reshape(()), zero.reshape(-1) if per_channel else
                zero.reshape(()), low, high, axis if per_channel else None)


def as_conv(node: onnx.NodeProto) -> onnx.NodeProto:
    conv = helper.make_node("Conv", ["x", "w"], ["y"], name=node.name or "case")
    conv.attribute.extend(node.attribute)
    return conv


def run_kernel(builder, node, operands, output_grid):
    arithmetic = FixedPointArithmetic(SPEC_ROUNDING, OPSETS)
    prepared = builder(node, operands, [output_grid], arithmetic)
    assert prepared is not None
    values = [op.value if op.kind == "activation" else None for op in operands]
    return prepared.run(values)[0]


def activation(values, scale, zero_point) -> Operand:
    values = np.asarray(values)
    op = Operand("activation", grid(scale, zero_point, values.dtype))
    op.value = values.astype(np.int64)
    return op


QLINEARCONV = onnx_cases("qlinearconv", "QLinearConv", ("export",))
QLINEARMATMUL = onnx_cases("qlinearmatmul", "QLinearMatMul", ("export_int",))
CONVINTEGER = onnx_cases("convinteger", "ConvInteger", ("export_without_padding", "export_with_padding"))
MATMULINTEGER = onnx_cases("matmulinteger", "MatMulInteger", ("export",))


def test_the_cases_are_there():
    assert [c[3] for c in QLINEARCONV] == ["test_qlinearconv"]
    assert len(QLINEARMATMUL) == 8 and len(CONVINTEGER) == 2 and len(MATMULINTEGER) == 1


@pytest.mark.parametrize("case", QLINEARCONV, ids=lambda c: c[3])
def test_qlinearconv_case(case):
    node, (x, xs, xz, w, ws, wz, ys, yz), (expected,), _ = case
    operands = [activation(x, xs, xz), Operand("integer_constant", grid(ws, wz, w.dtype, axis=0), w.astype(np.int64))]
    got = run_kernel(build_conv, as_conv(node), operands, grid(ys, yz, expected.dtype))
    assert np.array_equal(got, expected.astype(np.int64))


@pytest.mark.parametrize("case", QLINEARMATMUL, ids=lambda c: c[3])
def test_qlinearmatmul_case(case):
    node, (a, a_s, a_z, b, b_s, b_z, y_s, y_z), (expected,), _ = case
    operands = [activation(a, a_s, a_z), Operand("integer_constant", grid(b_s, b_z, b.dtype), b.astype(np.int64))]
    got = run_kernel(build_matmul, helper.make_node("MatMul", ["a", "b"], ["y"]), operands,
                     grid(y_s, y_z, expected.dtype))
    assert np.array_equal(got, expected.astype(np.int64))


@pytest.mark.parametrize("case", CONVINTEGER, ids=lambda c: c[3])
def test_convinteger_case(case):
    # ConvInteger outputs the int32 sums: the same kernel with every scale 1 and an int32 output grid
    node, inputs, (expected,), _ = case
    x, w, x_zero = inputs[0], inputs[1], inputs[2]
    w_zero = inputs[3] if len(inputs) > 3 else np.zeros(1, np.uint8)
    channels = w.shape[0]
    operands = [activation(x, 1.0, x_zero),
                Operand("integer_constant", grid(np.ones(channels), np.broadcast_to(w_zero, (channels,)), w.dtype,
                                                 axis=0), w.astype(np.int64))]
    got = run_kernel(build_conv, as_conv(node), operands, grid(1.0, 0, np.int32))
    assert np.array_equal(got, expected.astype(np.int64))


@pytest.mark.parametrize("case", MATMULINTEGER, ids=lambda c: c[3])
def test_matmulinteger_case(case):
    node, (a, b, a_zero, b_zero), (expected,), _ = case
    operands = [activation(a, 1.0, a_zero), Operand("integer_constant", grid(1.0, b_zero, b.dtype), b.astype(np.int64))]
    got = run_kernel(build_matmul, helper.make_node("MatMul", ["a", "b"], ["y"]), operands, grid(1.0, 0, np.int32))
    assert np.array_equal(got, expected.astype(np.int64))
