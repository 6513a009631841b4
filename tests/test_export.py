"""qfit export on the demo: the int8 model as C99 data, judged by things outside qfit.

* The C compiler (ISO/IEC 9899:1999 through `cc -std=c99 -Wall -Wextra -Werror -pedantic`) compiles
  the generated pair, and a C program compiled against it checks every array's length, an FNV-1a
  checksum computed here in Python from the ONNX model's own initializers, each array's alignment,
  the tables' cross references, and that no two tensors live at the same step overlap in the arena.
* The toolchain's own size accounting (`size -A` on the object, one section per array through
  -fdata-sections) agrees with the report's flash figure for weights, biases and weight scales.
* Exact rational arithmetic (`fractions`) checks each multiplier and shift against the ONNX scales:
  M0 * 2^(shift - 31) is the nearest 31-bit fixed-point value of the real factor (Jacob et al.,
  CVPR 2018, section 2.2).
* Round trip: arrays dumped from the compiled C data, with the manifest's scales and plan, rebuilt
  into a QDQ graph and run through qfit's integer evaluation path, give output integers identical
  to the int8 ONNX model's on demo images.
The helpers are shared with tests/test_export_names.py (hostile names, every layer kind).
"""
from __future__ import annotations

import base64
import json
import os
import re
import shutil
import subprocess
from fractions import Fraction

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from PIL import Image

from qfit.cli.main import main

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
DEMO = os.path.join(ROOT, "calib_demo")
CC = shutil.which("cc") or shutil.which("gcc")
C99_STRICT = ["-std=c99", "-Wall", "-Wextra", "-Werror", "-pedantic"]   # ISO/IEC 9899:1999, no extensions
needs_cc = pytest.mark.skipif(CC is None, reason="no C compiler on PATH (.ci/run installs gcc)")

# FNV-1a, 32 bits (Fowler, Noll, Vo; offset basis and prime as published for the 32-bit variant, from memory)
FNV_OFFSET, FNV_PRIME = 2166136261, 16777619


def fnv1a32(values) -> int:
    """Over each value's 4-byte little-endian two's complement, as docs/export.md defines the checksum."""
    h = FNV_OFFSET
    for v in np.asarray(values, dtype=np.int64).ravel().tolist():
        for byte in (v & 0xFFFFFFFF).to_bytes(4, "little"):
            h = ((h ^ byte) * FNV_PRIME) & 0xFFFFFFFF
    return h


# ---- the ONNX side, read without qfit ------------------------------------------------------------

def onnx_constants(model: onnx.ModelProto) -> dict[str, np.ndarray]:
    return {i.name: numpy_helper.to_array(i) for i in model.graph.initializer}


def onnx_activation_quantizer(model: onnx.ModelProto, tensor: str) -> tuple[float, int]:
    """(scale, zero point) of the QuantizeLinear that stores `tensor` (or that a graph output's
    DequantizeLinear reads)."""
    consts = onnx_constants(model)
    by_output = {n.output[0]: n for n in model.graph.node}
    for node in model.graph.node:
        if node.op_type == "QuantizeLinear" and node.input[0] == tensor:
            return float(consts[node.input[1]].reshape(-1)[0]), int(consts[node.input[2]].reshape(-1)[0])
    dq = by_output[tensor]
    assert dq.op_type == "DequantizeLinear"
    return onnx_activation_quantizer(model, by_output[dq.input[0]].input[0])


def onnx_dequantizer_of(model: onnx.ModelProto, initializer: str) -> onnx.NodeProto:
    return next(n for n in model.graph.node if n.op_type == "DequantizeLinear" and n.input[0] == initializer)


def expected_values(model: onnx.ModelProto, array: dict, layer: dict) -> np.ndarray:
    """An exported weight or bias array as the ONNX initializer holds it (a [K, N] matrix of a fully
    connected layer is exported as [N, K])."""
    values = onnx_constants(model)[array["source"]].astype(np.int64)
    if list(values.shape) != array["shape"]:
        assert layer["kind"] == "FULLY_CONNECTED" and list(values.T.shape) == array["shape"]
        values = values.T
    return values.ravel()


def manifest_values(array: dict) -> np.ndarray:
    dtype = "<i1" if array["type"] == "int8_t" else "<i4"
    return np.frombuffer(base64.b64decode(array["data_base64"]), dtype=dtype).astype(np.int64)


def real_factors(model: onnx.ModelProto, manifest: dict, layer: dict) -> list[Fraction]:
    """The real requantization factors of one layer, from the ONNX scales, as docs/export.md states them."""
    tensors = manifest["tensors"]
    s_in = [Fraction(onnx_activation_quantizer(model, tensors[i]["name"])[0]) for i in layer["inputs"]]
    s_out = Fraction(onnx_activation_quantizer(model, tensors[layer["output"]]["name"])[0])
    kind = layer["kind"]
    if kind in ("CONV", "FULLY_CONNECTED"):
        weights = next(a for a in manifest["arrays"] if a["name"] == layer["weights"])
        scales = onnx_constants(model)[onnx_dequantizer_of(model, weights["source"]).input[1]].reshape(-1)
        return [s_in[0] * Fraction(float(s)) / s_out for s in scales]
    if kind == "ADD":
        twice_max = 2 * max(s_in)
        return [twice_max / (2 ** layer["left_shift"] * s_out)] + [s / twice_max for s in s_in]
    if kind == "MUL":
        return [s_in[0] * s_in[1] / s_out]
    if kind in ("AVERAGE_POOL", "GLOBAL_AVERAGE_POOL"):
        counts = window_counts(layer, tensors[layer["inputs"][0]]["shape"], tensors[layer["output"]]["shape"])
        return [s_in[0] / (s_out * int(n)) for n in counts]
    return [s / s_out for s in s_in]


def window_counts(layer: dict, in_shape: list[int], out_shape: list[int]) -> list[int]:
    """Input positions inside each output window, padding not counted (the ONNX AveragePool default)."""
    counts = []
    for oh in range(out_shape[2]):
        for ow in range(out_shape[3]):
            taps = [[o * layer["stride"][d] - layer["pads"][d] + k * layer["dilation"][d]
                     for k in range(layer["kernel"][d])] for d, o in ((0, oh), (1, ow))]
            counts.append(sum(0 <= r < in_shape[2] for r in taps[0]) * sum(0 <= c < in_shape[3] for c in taps[1]))
    return counts[:1] if len(set(counts)) == 1 else counts


def check_multipliers(model: onnx.ModelProto, manifest: dict) -> int:
    """Every (M0, shift) is the nearest 31-bit fixed-point value of its real factor (exact arithmetic;
    Jacob et al. 2018, section 2.2). Returns how many pairs were checked."""
    arrays = {a["name"]: a for a in manifest["arrays"]}
    checked = 0
    for layer in manifest["layers"]:
        if layer["multipliers"] is None:
            continue
        m0 = manifest_values(arrays[layer["multipliers"]])
        shift = manifest_values(arrays[layer["shifts"]])
        reals = real_factors(model, manifest, layer)
        assert len(reals) == m0.size == shift.size, layer["name"]
        for real, m, s in zip(reals, m0.tolist(), shift.tolist()):
            assert (1 << 30) <= m < (1 << 31), (layer["name"], m)
            # |M0 - real * 2^(31 - shift)| <= 1/2, plus the float64 rounding of the product (< 1e-6 here)
            error = abs(Fraction(m) - real * Fraction(2) ** (31 - s))
            assert error <= Fraction(1, 2) + Fraction(1, 10 ** 6), layer["name"]
            checked += 1
    return checked


def assert_factors_are_the_integer_paths(model: onnx.ModelProto, manifest: dict) -> int:
    """Every exported (M0, shift) is the one qfit's integer path runs the layer with (its per-layer
    record), and a layer exported as a table is one the path runs as a lookup table. Returns how many
    layers' factors were compared."""
    from qfit.measure.integer import layer_requantization

    records = layer_requantization(model)
    arrays = {a["name"]: a for a in manifest["arrays"]}
    compared = 0
    for layer in manifest["layers"]:
        record = records.get(layer["name"])
        if layer["table"] is not None:     # a lone clamp: the path runs it as a lookup table too
            assert record == {"lookup_table_entries": 256}, layer["name"]
            continue
        if layer["multipliers"] is None:
            assert record is None, layer["name"]
            continue
        ours = list(zip(manifest_values(arrays[layer["multipliers"]]).tolist(),
                        manifest_values(arrays[layer["shifts"]]).tolist()))
        if "inputs" in record:       # Concat: per input, "copied" where the grids are equal (a factor of 1)
            theirs = [(1 << 30, 1) if r == "copied" else (r["multiplier"][0], r["shift"][0]) for r in record["inputs"]]
        else:
            theirs = list(zip(record["multiplier"], record["shift"]))
            if "input0_multiplier" in record:
                theirs += [(record["input0_multiplier"], record["input0_shift"]),
                           (record["input1_multiplier"], record["input1_shift"])]
        if len(ours) == 1 and len(set(theirs)) == 1:   # one factor stands for equal per-position ones
            theirs = theirs[:1]
        assert ours == theirs, layer["name"]
        compared += 1
    return compared


# ---- the C side ----------------------------------------------------------------------------------

C_CHECK_PROGRAM = r"""
#include <stdint.h>
#include <stdio.h>
#include <string.h>
#include "qmodel.h"
#include "expected.h"

static int failures = 0;
#define CHECK(cond, ...) \
    do { if (!(cond)) { ++failures; fprintf(stderr, __VA_ARGS__); fputc('\n', stderr); } } while (0)

static int32_t element(const qmodel_array *a, uint32_t i)
{
    return a->elem_bytes == 1 ? (int32_t)((const int8_t *)a->data)[i] : ((const int32_t *)a->data)[i];
}

static uint32_t fnv1a32(const qmodel_array *a)
{
    uint32_t h = 2166136261u, i;
    int k;
    for (i = 0; i < a->count; ++i) {
        uint32_t u = (uint32_t)element(a, i);
        for (k = 0; k < 4; ++k) {
            h ^= (u >> (8 * k)) & 0xffu;
            h *= 16777619u;
        }
    }
    return h;
}

static const qmodel_array *array_of(uint32_t layer, int role)
{
    uint32_t i;
    for (i = 0; i < QMODEL_ARRAY_COUNT; ++i)
        if (qmodel_arrays[i].layer == layer && qmodel_arrays[i].role == role)
            return &qmodel_arrays[i];
    return NULL;
}

static void check_arrays(void)
{
    uint32_t i, total = 0;
    CHECK(QMODEL_ARRAY_COUNT == EXPECTED_ARRAY_COUNT, "array count %u, expected %u",
          (unsigned)QMODEL_ARRAY_COUNT, (unsigned)EXPECTED_ARRAY_COUNT);
    for (i = 0; i < QMODEL_ARRAY_COUNT && i < EXPECTED_ARRAY_COUNT; ++i) {
        const qmodel_array *a = &qmodel_arrays[i];
        CHECK(strcmp(a->name, expected_name[i]) == 0, "array %u is %s, expected %s", (unsigned)i, a->name,
              expected_name[i]);
        CHECK(a->count == expected_count[i], "%s: %u elements, expected %u", a->name, (unsigned)a->count,
              (unsigned)expected_count[i]);
        CHECK(fnv1a32(a) == expected_fnv[i], "%s: checksum %lu, expected %lu", a->name,
              (unsigned long)fnv1a32(a), (unsigned long)expected_fnv[i]);
        CHECK((uintptr_t)a->data % QMODEL_ALIGNMENT == 0, "%s: not aligned to %d bytes", a->name, QMODEL_ALIGNMENT);
        total += a->count * a->elem_bytes;
    }
    CHECK(total == QMODEL_FLASH_BYTES, "arrays hold %lu bytes, QMODEL_FLASH_BYTES says %lu",
          (unsigned long)total, (unsigned long)QMODEL_FLASH_BYTES);
}

static void check_layer(uint32_t l)
{
    const qmodel_layer *y = &qmodel_layers[l];
    const qmodel_array *w = array_of(l, QMODEL_ROLE_WEIGHTS), *b = array_of(l, QMODEL_ROLE_BIAS);
    const qmodel_array *m = array_of(l, QMODEL_ROLE_MULTIPLIERS), *s = array_of(l, QMODEL_ROLE_SHIFTS);
    const qmodel_array *t = array_of(l, QMODEL_ROLE_TABLE);
    uint32_t i, product = 1;
    CHECK((w ? w->data : NULL) == (const void *)y->weights && y->weight_count == (w ? w->count : 0u),
          "layer %u: weights pointer or count", (unsigned)l);
    for (i = 0; i < 4 && y->weight_shape[i]; ++i)
        product *= y->weight_shape[i];
    CHECK(!w || product == y->weight_count, "layer %u: weight shape holds %u, not %u", (unsigned)l,
          (unsigned)product, (unsigned)y->weight_count);
    CHECK((b ? b->data : NULL) == (const void *)y->bias && y->bias_count == (b ? b->count : 0u),
          "layer %u: bias", (unsigned)l);
    CHECK((m ? m->data : NULL) == (const void *)y->multipliers && (s ? s->data : NULL) == (const void *)y->shifts
          && y->requant_count == (m ? m->count : 0u) && y->requant_count == (s ? s->count : 0u),
          "layer %u: multipliers and shifts", (unsigned)l);
    CHECK((t ? t->data : NULL) == (const void *)y->table && (!t || t->count == 256u), "layer %u: table", (unsigned)l);
    CHECK(y->act_min <= y->act_max, "layer %u: clamp [%d, %d]", (unsigned)l, y->act_min, y->act_max);
    CHECK(y->input_first + y->input_count <= QMODEL_LAYER_INPUT_COUNT && y->output < QMODEL_TENSOR_COUNT,
          "layer %u: tensor indices", (unsigned)l);
    for (i = 0; i <= y->input_count; ++i) {
        /* every tensor a layer reads or writes is live at the layer's step */
        uint32_t t = i < y->input_count ? qmodel_layer_inputs[y->input_first + i] : y->output;
        CHECK(t < QMODEL_TENSOR_COUNT && qmodel_tensors[t].first_step <= (int32_t)y->step
              && (int32_t)y->step <= qmodel_tensors[t].last_step, "layer %u: tensor %u not live at step %u",
              (unsigned)l, (unsigned)t, (unsigned)y->step);
    }
    printf("L %u %u %u %u %u %u %u %u %u %u %u %u %u %u %u %u %u %u %u %d %d %u %u %u\n", (unsigned)l,
           (unsigned)y->kind, (unsigned)y->step, (unsigned)y->input_first, (unsigned)y->input_count,
           (unsigned)y->output, (unsigned)y->kernel[0], (unsigned)y->kernel[1], (unsigned)y->stride[0],
           (unsigned)y->stride[1], (unsigned)y->pad[0], (unsigned)y->pad[1], (unsigned)y->pad[2],
           (unsigned)y->pad[3], (unsigned)y->dilation[0], (unsigned)y->dilation[1], (unsigned)y->groups,
           (unsigned)y->axis, (unsigned)y->left_shift, y->act_min, y->act_max, (unsigned)y->weight_count,
           (unsigned)y->bias_count, (unsigned)y->requant_count);
}

static void check_tensors(void)
{
    uint32_t i, j, k, elements;
    for (i = 0; i < QMODEL_TENSOR_COUNT; ++i) {
        const qmodel_tensor *t = &qmodel_tensors[i];
        for (k = 0, elements = 1; k < t->rank; ++k)
            elements *= t->shape[k];
        CHECK(elements == t->bytes, "tensor %u: shape holds %u, bytes %u", (unsigned)i, (unsigned)elements,
              (unsigned)t->bytes);
        CHECK(t->arena_offset + t->bytes <= QMODEL_ARENA_BYTES, "tensor %u ends past the arena", (unsigned)i);
        CHECK(t->arena_offset % QMODEL_ARENA_ALIGNMENT == 0, "tensor %u: offset not aligned", (unsigned)i);
        for (j = 0; j < i; ++j) {
            const qmodel_tensor *u = &qmodel_tensors[j];
            int live_together = t->first_step <= u->last_step && u->first_step <= t->last_step;
            int apart = t->arena_offset + t->bytes <= u->arena_offset || u->arena_offset + u->bytes <= t->arena_offset;
            if (t->buffer == u->buffer)
                CHECK(t->arena_offset == u->arena_offset, "tensors %u and %u share a slot at two offsets",
                      (unsigned)j, (unsigned)i);
            else
                CHECK(!live_together || apart, "overlap: tensors %u and %u live at the same step share arena bytes",
                      (unsigned)j, (unsigned)i);
        }
        printf("T %u %lu %lu %lu %ld %ld %u %u %lu %lu %lu %lu %.9g %ld\n", (unsigned)i, (unsigned long)t->arena_offset,
               (unsigned long)t->bytes, (unsigned long)t->buffer, (long)t->first_step, (long)t->last_step,
               (unsigned)t->rank, (unsigned)t->layout, (unsigned long)t->shape[0], (unsigned long)t->shape[1],
               (unsigned long)t->shape[2], (unsigned long)t->shape[3], (double)t->scale, (long)t->zero_point);
    }
}

int main(int argc, char **argv)
{
    uint32_t i;
    check_arrays();
    check_tensors();
    for (i = 0; i < QMODEL_LAYER_COUNT; ++i)
        check_layer(i);
    for (i = 0; i < QMODEL_LAYER_INPUT_COUNT; ++i)
        printf("I %lu\n", (unsigned long)qmodel_layer_inputs[i]);
    if (argc == 2) {   /* dump every array as stored (directory order), then every tensor and layer name */
        FILE *f = fopen(argv[1], "wb");
        for (i = 0; f && i < QMODEL_ARRAY_COUNT; ++i)
            fwrite(qmodel_arrays[i].data, qmodel_arrays[i].elem_bytes, qmodel_arrays[i].count, f);
        for (i = 0; f && i < QMODEL_TENSOR_COUNT; ++i)
            fwrite(qmodel_tensors[i].name, 1, strlen(qmodel_tensors[i].name) + 1, f);
        for (i = 0; f && i < QMODEL_LAYER_COUNT; ++i)
            fwrite(qmodel_layers[i].name, 1, strlen(qmodel_layers[i].name) + 1, f);
        CHECK(f != NULL && fclose(f) == 0, "cannot write %s", argv[1]);
    }
    printf("%s %d failures\n", failures ? "FAILED" : "ok", failures);
    return failures ? 1 : 0;
}
"""


def expected_header(model: onnx.ModelProto, manifest: dict) -> str:
    """expected.h: per array (directory order) its name, element count and checksum. Weights and
    biases come from the ONNX initializers; multipliers and shifts from the manifest after
    `check_multipliers` has checked them against the ONNX scales."""
    names, counts, sums = [], [], []
    layers = manifest["layers"]
    for array in manifest["arrays"]:
        if array["role"] in ("weights", "bias"):
            values = expected_values(model, array, layers[array["layer"]])
        else:
            values = manifest_values(array)
        names.append(array["name"])
        counts.append(values.size)
        sums.append(fnv1a32(values))
    n = len(names)
    return "\n".join([
        f"#define EXPECTED_ARRAY_COUNT {n}u",
        f"static const char *const expected_name[{max(n, 1)}] = "
        f"{{ {', '.join(json.dumps(x) for x in names) or '0'} }};",
        f"static const uint32_t expected_count[{max(n, 1)}] = {{ {', '.join(f'{c}u' for c in counts) or '0'} }};",
        f"static const uint32_t expected_fnv[{max(n, 1)}] = {{ {', '.join(f'{s}u' for s in sums) or '0'} }};", ""])


def run_cc(args: list[str], cwd) -> None:
    result = subprocess.run([CC, *C99_STRICT, *args], cwd=cwd, capture_output=True, text=True)
    assert result.returncode == 0, result.stderr[-4000:]


def build_check_program(export_dir, model: onnx.ModelProto, manifest: dict, work) -> str:
    """Compile the C check program against the exported pair; returns the executable's path."""
    prefix = manifest["prefix"]
    os.makedirs(work, exist_ok=True)
    program = C_CHECK_PROGRAM.replace("qmodel", prefix).replace("QMODEL", prefix.upper())
    with open(os.path.join(work, "check_export.c"), "w") as f:
        f.write(program)
    with open(os.path.join(work, "expected.h"), "w") as f:
        f.write(expected_header(model, manifest))
    exe = os.path.join(work, "check_export")
    run_cc(["-I", str(export_dir), "-I", str(work), os.path.join(work, "check_export.c"),
            os.path.join(str(export_dir), manifest["files"]["source"]), "-o", exe], cwd=work)
    return exe


def tables_match_manifest(stdout: str, manifest: dict) -> None:
    """The C tables, as the compiled program prints them, hold the manifest's values."""
    kinds, layouts = manifest["codes"]["kind"], manifest["codes"]["layout"]
    tensors = [line.split()[1:] for line in stdout.splitlines() if line.startswith("T ")]
    layers = [line.split()[1:] for line in stdout.splitlines() if line.startswith("L ")]
    inputs = [int(line.split()[1]) for line in stdout.splitlines() if line.startswith("I ")]
    assert len(tensors) == len(manifest["tensors"]) and len(layers) == len(manifest["layers"])
    for row, t in zip(tensors, manifest["tensors"]):
        shape = t["shape"] + [0] * (4 - len(t["shape"]))
        want = [t["index"], t["arena_offset"], t["bytes"], t["buffer"], t["first_step"], t["last_step"],
                len(t["shape"]), layouts[t["layout"]], *shape]
        assert [int(v) for v in row[:12]] == want
        assert np.float32(float(row[12])) == np.float32(t["scale"]) and int(row[13]) == t["zero_point"]
    arrays = {a["name"]: a for a in manifest["arrays"]}
    first = 0
    for row, y in zip(layers, manifest["layers"]):
        count = lambda name: arrays[name]["count"] if name else 0  # noqa: E731
        want = [y["index"], kinds[y["kind"]], y["step"], first, len(y["inputs"]), y["output"], *y["kernel"],
                *y["stride"], *y["pads"], *y["dilation"], y["groups"], y["axis"], y["left_shift"], y["act_min"],
                y["act_max"], count(y["weights"]), count(y["bias"]), count(y["multipliers"])]
        assert [int(v) for v in row] == want, y["name"]
        assert inputs[first:first + len(y["inputs"])] == y["inputs"]
        first += len(y["inputs"])


def dumped_arrays(path, manifest: dict) -> dict[str, np.ndarray]:
    """Arrays as the compiled object holds them (the check program's dump), by name."""
    return read_dump(path, manifest)[0]


def read_dump(path, manifest: dict) -> tuple[dict[str, np.ndarray], list[bytes]]:
    """(arrays by name, the tensor then layer names as the compiled strings hold them)."""
    data = open(path, "rb").read()
    out, at = {}, 0
    for array in manifest["arrays"]:
        dtype = np.dtype("<i1" if array["type"] == "int8_t" else "<i4")
        out[array["name"]] = np.frombuffer(data, dtype=dtype, count=array["count"], offset=at).astype(np.int64)
        at += array["count"] * dtype.itemsize
    names = data[at:].split(b"\0")
    assert names[-1] == b"" and len(names) - 1 == len(manifest["tensors"]) + len(manifest["layers"])
    return out, names[:-1]


# ---- round trip: export -> QDQ graph -> integer path ---------------------------------------------

def _weight_scales(layer: dict, m0: np.ndarray, shift: np.ndarray, s_in: float, s_out: float) -> np.ndarray:
    """float32 weight scales that give back exactly the exported (M0, shift): s_w = M0 2^(shift-31) s_out / s_in
    lies within 2^-30 (relative) of the float32 scale it came from, so rounding it to float32 recovers that."""
    from qfit.quant.fixed_point import quantize_multiplier

    scales = (m0.astype(np.float64) * np.exp2(shift.astype(np.float64) - 31) * s_out / s_in).astype(np.float32)
    for s, m, k in zip(scales.tolist(), m0.tolist(), shift.tolist()):
        real = float(np.float64(s_in) * np.float64(np.float32(s)) / np.float64(s_out))
        assert quantize_multiplier(real) == (m, k), layer["name"]
    return scales


def qdq_from_export(manifest: dict, arrays: dict[str, np.ndarray], opset: int = 21) -> onnx.ModelProto:
    """A QDQ graph holding exactly the export's integers, scales, zero points, clamps and layer
    attributes (graph output: the output tensor's int8 values)."""
    nodes, inits = [], []
    tensors = manifest["tensors"]

    def const(name, value):
        inits.append(numpy_helper.from_array(np.asarray(value), name))
        return name

    def quantizer(i):
        if f"t{i}_s" not in {init.name for init in inits}:
            const(f"t{i}_s", np.float32(tensors[i]["scale"]))
            const(f"t{i}_z", np.int8(tensors[i]["zero_point"]))
        return [f"t{i}_s", f"t{i}_z"]

    def dq(i):
        if not any(f"t{i}_f" in n.output for n in nodes):
            nodes.append(helper.make_node("DequantizeLinear", [f"t{i}_q", *quantizer(i)], [f"t{i}_f"]))
        return f"t{i}_f"

    for i in manifest["inputs"]:
        nodes.append(helper.make_node("QuantizeLinear", [f"t{i}_in", *quantizer(i)], [f"t{i}_q"]))
    for layer in manifest["layers"]:
        _layer_nodes(layer, manifest, arrays, nodes, const, dq)
        y, out = f"l{layer['index']}_y", layer["output"]
        if layer["kind"] != "CLAMP" and (layer["act_min"], layer["act_max"]) != (-128, 127):
            nodes.append(helper.make_node("Clip", [y, *clamp_bounds(layer, tensors[out], const)], [y + "c"]))
            y += "c"
        nodes.append(helper.make_node("QuantizeLinear", [y, *quantizer(out)], [f"t{out}_q"]))
    inputs = [helper.make_tensor_value_info(f"t{i}_in", TensorProto.FLOAT, tensors[i]["shape"])
              for i in manifest["inputs"]]
    outputs = [helper.make_tensor_value_info(f"t{i}_q", TensorProto.INT8, tensors[i]["shape"])
               for i in manifest["outputs"]]
    graph = helper.make_graph(nodes, "from_export", inputs, outputs, inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])


def clamp_bounds(layer: dict, tensor: dict, const) -> list[str]:
    """A layer's int8 clamp as float Clip bounds that the output's quantizer maps back onto it."""
    return [const(f"l{layer['index']}_{side}", np.float32((v - tensor["zero_point"]) * np.float32(tensor["scale"])))
            for side, v in (("lo", layer["act_min"]), ("hi", layer["act_max"]))]


def _layer_nodes(layer: dict, manifest: dict, arrays: dict, nodes: list, const, dq) -> None:
    tensors, kind, i = manifest["tensors"], layer["kind"], layer["index"]
    ins = [dq(t) for t in layer["inputs"]]
    y = f"l{i}_y"
    window = dict(kernel_shape=layer["kernel"], strides=layer["stride"], pads=layer["pads"])
    if kind in ("CONV", "FULLY_CONNECTED"):
        w = manifest["arrays"][[a["name"] for a in manifest["arrays"]].index(layer["weights"])]
        m0, shift = arrays[layer["multipliers"]], arrays[layer["shifts"]]
        s_in, s_out = tensors[layer["inputs"][0]]["scale"], tensors[layer["output"]]["scale"]
        s_w = _weight_scales(layer, m0, shift, s_in, s_out)
        wq = const(f"l{i}_wq", arrays[layer["weights"]].astype(np.int8).reshape(w["shape"]))
        if s_w.size == 1:   # one scale for the whole weight: a per-tensor quantizer (scalar scale and zero point)
            s_w = s_w.reshape(())
        w_zero = const(f"l{i}_wz", np.zeros(s_w.shape, np.int8))
        nodes.append(helper.make_node("DequantizeLinear", [wq, const(f"l{i}_ws", s_w), w_zero], [f"l{i}_w"], axis=0))
        operands = [ins[0], f"l{i}_w"]
        if layer["bias"]:
            bq = const(f"l{i}_bq", arrays[layer["bias"]].astype(np.int32))
            bs = (np.float32(s_in) * s_w).astype(np.float32)
            b_zero = const(f"l{i}_bz", np.zeros(bs.shape, np.int32))
            nodes.append(helper.make_node("DequantizeLinear", [bq, const(f"l{i}_bs", bs), b_zero], [f"l{i}_b"], axis=0))
            operands.append(f"l{i}_b")
        if kind == "CONV":
            nodes.append(helper.make_node("Conv", operands, [y], dilations=layer["dilation"], group=layer["groups"],
                                          **window))
        else:
            nodes.append(helper.make_node("Gemm", operands, [y], transB=1))
    elif kind in ("ADD", "MUL", "CONCAT"):
        op = {"ADD": "Add", "MUL": "Mul", "CONCAT": "Concat"}[kind]
        nodes.append(helper.make_node(op, ins, [y], **({"axis": layer["axis"]} if kind == "CONCAT" else {})))
    elif kind == "AVERAGE_POOL":
        nodes.append(helper.make_node("AveragePool", ins, [y], **window))
    elif kind == "MAX_POOL":
        nodes.append(helper.make_node("MaxPool", ins, [y], dilations=layer["dilation"], **window))
    elif kind in ("GLOBAL_AVERAGE_POOL", "GLOBAL_MAX_POOL"):
        op = "GlobalAveragePool" if kind == "GLOBAL_AVERAGE_POOL" else "GlobalMaxPool"
        nodes.append(helper.make_node(op, ins, [y]))
    elif kind == "RESHAPE":
        shape = const(f"l{i}_shape", np.array(tensors[layer["output"]]["shape"], np.int64))
        nodes.append(helper.make_node("Reshape", [ins[0], shape], [y]))
    elif kind == "CLAMP":   # the clamp itself is added after the layer (act_min, act_max)
        nodes.append(helper.make_node("Clip", [ins[0], *clamp_bounds(layer, tensors[layer["output"]], const)], [y]))
    else:
        raise AssertionError(f"no rebuild for {kind}")


def integer_tensors(model: onnx.ModelProto, feeds: dict[str, np.ndarray], names: list[str]) -> dict[str, np.ndarray]:
    """The integers of the QuantizeLinear outputs `names` through qfit's integer path, sample by sample."""
    from qfit.measure.integer import IntegerProgram

    program = IntegerProgram(model, "double")
    assert program.float_nodes == []    # every layer ran as an integer kernel
    n = next(iter(feeds.values())).shape[0]
    runs = [program.run({k: v[j:j + 1] for k, v in feeds.items()}, names) for j in range(n)]
    return {name: np.concatenate([r[name] for r in runs]) for name in names}


def quantized_name_of(model: onnx.ModelProto, tensor: str) -> str:
    """The QuantizeLinear output that stores `tensor` (a graph output: the one its DequantizeLinear reads)."""
    for node in model.graph.node:
        if node.op_type == "QuantizeLinear" and node.input[0] == tensor:
            return node.output[0]
    return next(n.input[0] for n in model.graph.node if n.op_type == "DequantizeLinear" and n.output[0] == tensor)


def assert_round_trip(model: onnx.ModelProto, manifest: dict, arrays: dict[str, np.ndarray], feeds: np.ndarray) -> dict:
    """Every exported tensor, computed by the integer path from the export, equals the same tensor of
    the int8 ONNX model computed by the integer path; returns the output integers."""
    rebuilt = qdq_from_export(manifest, arrays)
    onnx.checker.check_model(rebuilt)
    tensors = manifest["tensors"]
    (input_index,) = manifest["inputs"]
    ours = [quantized_name_of(model, t["name"]) for t in tensors]
    expected = integer_tensors(model, {tensors[input_index]["name"]: feeds}, ours)
    got = integer_tensors(rebuilt, {f"t{input_index}_in": feeds}, [f"t{i}_q" for i in range(len(tensors))])
    for i, tensor in enumerate(tensors):
        assert np.array_equal(got[f"t{i}_q"], expected[ours[i]]), tensor["name"]
    return {tensors[i]["name"]: expected[ours[i]] for i in manifest["outputs"]}


# ---- the demo ------------------------------------------------------------------------------------

def _demo_images(per_class: int) -> np.ndarray:
    pre = json.load(open(os.path.join(DEMO, "preprocess.json")))
    images = []
    for cls in sorted(os.listdir(os.path.join(DEMO, "eval"))):
        for name in sorted(os.listdir(os.path.join(DEMO, "eval", cls)))[:per_class]:
            pixels = np.asarray(Image.open(os.path.join(DEMO, "eval", cls, name)).convert("RGB")
                                .resize(tuple(pre["size"][::-1]), Image.BILINEAR), np.float32)
            x = (pixels * pre["scale"] - np.array(pre["mean"], np.float32)) / np.array(pre["std"], np.float32)
            images.append(x.transpose(2, 0, 1))
    return np.stack(images).astype(np.float32)


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """`qfit check --export` on the demo (a short evaluation: the export needs the model and the
    report), then `qfit export` on the int8 model it wrote."""
    out = tmp_path_factory.mktemp("export_demo")
    code = main(["check", os.path.join(DEMO, "model.onnx"), "--calib", os.path.join(DEMO, "calib"),
                 "--eval", os.path.join(DEMO, "eval"), "--preprocess", os.path.join(DEMO, "preprocess.json"),
                 "--flash", "1MiB", "--sram", "256KiB", "--out", str(out / "check"), "--quiet",
                 "--eval-limit", "60", "--isolated-samples", "0", "--export", str(out / "from_check")])
    assert code == 0
    report = json.load(open(out / "check" / "report.json"))
    model_path = str(out / "check" / report["outputs"]["model"])
    assert main(["export", model_path, "--out", str(out / "c")]) == 0
    manifest = json.load(open(out / "c" / "qmodel.json"))
    return {"dir": out / "c", "check_dir": out / "from_check", "model_path": model_path,
            "model": onnx.load(model_path), "manifest": manifest, "report": report, "work": out / "work"}


def test_export_writes_header_source_and_manifest_and_check_export_writes_the_same(demo):
    names = sorted(p.name for p in demo["dir"].iterdir())
    assert names == ["qmodel.c", "qmodel.h", "qmodel.json"]
    for name in names:   # the check's own budget and a fresh one on the written model give the same plan
        assert (demo["dir"] / name).read_bytes() == (demo["check_dir"] / name).read_bytes(), name
    manifest = demo["manifest"]
    assert manifest["arena"]["bytes"] == demo["report"]["arena"]["bytes"]
    kinds = {layer["kind"] for layer in manifest["layers"]}
    assert {"CONV", "ADD", "GLOBAL_AVERAGE_POOL", "RESHAPE", "FULLY_CONNECTED"} <= kinds


def test_tensor_offsets_are_the_reports_arena_plan(demo):
    plan = {slot["tensor"]: slot for slot in demo["report"]["arena"]["plan"]}
    manifest = demo["manifest"]
    placed = 0
    for tensor in manifest["tensors"]:
        slot = plan.get(tensor["name"])
        if slot is not None:   # the first member of each slot names it; views and in-place outputs share it
            assert (tensor["arena_offset"], tensor["first_step"], tensor["last_step"]) == (
                slot["offset"], slot["first_step"], slot["last_step"])
            placed += 1
    assert placed >= len({t["buffer"] for t in manifest["tensors"]})
    assert [manifest["layers"][i]["step"] for i in range(len(manifest["layers"]))] == sorted(
        layer["step"] for layer in manifest["layers"])
    order = demo["report"]["order"]["order"]
    names = [layer["name"] for layer in manifest["layers"]]
    assert names == [n for n in order if n in set(names)]


def test_multipliers_and_shifts_are_the_nearest_fixed_point_factors(demo):
    assert check_multipliers(demo["model"], demo["manifest"]) > 1000


def test_multipliers_and_shifts_are_those_the_integer_path_runs(demo):
    pytest.importorskip("qfit.measure.integer", reason="the integer evaluation path is not installed")
    assert assert_factors_are_the_integer_paths(demo["model"], demo["manifest"]) == sum(
        layer["multipliers"] is not None for layer in demo["manifest"]["layers"])


@pytest.fixture(scope="module")
def c_checked(demo):
    """The C check program compiled against the demo's export and run: (its stdout, the arrays it dumped)."""
    if CC is None:
        pytest.skip("no C compiler on PATH (.ci/run installs gcc)")
    work = demo["work"]
    work.mkdir(exist_ok=True)
    exe = build_check_program(demo["dir"], demo["model"], demo["manifest"], work)
    result = subprocess.run([exe, str(work / "arrays.bin")], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr[-4000:]
    return result.stdout, dumped_arrays(work / "arrays.bin", demo["manifest"])


@needs_cc
def test_generated_files_compile_as_strict_c99(demo, tmp_path):
    run_cc(["-c", str(demo["dir"] / "qmodel.c"), "-o", str(tmp_path / "qmodel.o")], cwd=tmp_path)
    assert (tmp_path / "qmodel.o").stat().st_size > demo["manifest"]["flash"]["param_bytes"]


def test_c_program_checks_lengths_checksums_alignment_and_arena(demo, c_checked):
    stdout, dumped = c_checked
    assert stdout.rstrip().endswith("ok 0 failures")
    tables_match_manifest(stdout, demo["manifest"])
    for array in demo["manifest"]["arrays"]:
        assert np.array_equal(dumped[array["name"]], manifest_values(array)), array["name"]


def size_sections(obj) -> dict[str, int]:
    """Section sizes as `size -A` (GNU binutils) reports them."""
    result = subprocess.run(["size", "-A", str(obj)], capture_output=True, text=True, check=True)
    sections = {}
    for line in result.stdout.splitlines():
        parts = line.split()
        if len(parts) >= 2 and parts[0].startswith(".") and parts[1].isdigit():
            sections[parts[0]] = int(parts[1])
    return sections


@needs_cc
@pytest.mark.skipif(shutil.which("size") is None, reason="binutils' size is not on PATH")
def test_object_size_agrees_with_the_reports_flash_figure(demo, tmp_path):
    obj = tmp_path / "qmodel.o"
    run_cc(["-fdata-sections", "-c", str(demo["dir"] / "qmodel.c"), "-o", str(obj)], cwd=tmp_path)
    sections = size_sections(obj)
    manifest, report = demo["manifest"], demo["report"]
    alignment = manifest["alignment_bytes"]
    layers = manifest["layers"]
    in_object = {a["name"]: sections[f".rodata.{a['name']}"] for a in manifest["arrays"]}
    for array in manifest["arrays"]:   # the compiler's bytes per array are the manifest's
        assert in_object[array["name"]] == array["bytes"], array["name"]
    # weights, biases and per-channel multipliers + shifts of the layers with weights: the report's
    # flash rows count int8 weights, int32 biases and a 4-byte scale + 1-byte zero point per channel
    weighted = sum(size for name, size in in_object.items()
                   if layers[next(a["layer"] for a in manifest["arrays"] if a["name"] == name)]["kind"]
                   in ("CONV", "FULLY_CONNECTED"))
    report_bytes = sum(r["weight_bytes"] + r["bias_bytes"] + r["scale_bytes"] for r in report["flash"]["layers"])
    assert weighted == report_bytes
    # linked one after another at the array alignment, the arrays take at most this much more
    padding = sum(-size % alignment for size in in_object.values())
    total = sum(in_object.values())
    assert total + padding == manifest["flash"]["param_bytes_aligned"]
    assert report_bytes <= total <= report_bytes + padding + 5 * sum(
        a["count"] for a in manifest["arrays"] if a["role"] == "multipliers"
        and layers[a["layer"]]["kind"] not in ("CONV", "FULLY_CONNECTED"))
    header = (demo["dir"] / "qmodel.h").read_text()
    assert re.search(rf"#define QMODEL_FLASH_BYTES {total}u", header)


def test_round_trip_through_the_integer_path_gives_the_int8_models_integers(demo, c_checked):
    pytest.importorskip("qfit.measure.integer", reason="the integer evaluation path is not installed")
    _, arrays = c_checked    # the arrays as the compiled object holds them
    images = _demo_images(per_class=10)   # 60 evaluation images, the first 10 of each class
    outputs = assert_round_trip(demo["model"], demo["manifest"], arrays, images)
    (logits,) = outputs.values()
    assert logits.shape == (len(images), 6)
    assert len(np.unique(logits)) > 6   # not a constant output that any graph would give
