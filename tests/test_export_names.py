"""qfit export on a small hand-built int8 QDQ model with hostile names and every exported layer kind.

Node and tensor names hold quotes, comment delimiters, backslashes, trigraphs (C99 5.2.1.1), a tab,
line breaks, non-ASCII letters, a name that sanitises to nothing and one longer than C99's minimum
string-literal limit. Checks: the C compiler (ISO/IEC 9899:1999, strict), the C check program of
tests/test_export.py (array lengths, FNV-1a checksums from the ONNX initializers, alignment, arena
overlap), the compiled strings byte for byte, the checks failing on a planted fault, and the round
trip through the integer path for CONV (dense and depthwise), MAX_POOL, ADD, MUL, AVERAGE_POOL (per
position), CONCAT (per input), CLAMP, GLOBAL_AVERAGE_POOL, RESHAPE and FULLY_CONNECTED.
"""
from __future__ import annotations

import json
import os
import re
import subprocess

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from qfit.cli.main import main
from test_export import (assert_factors_are_the_integer_paths, assert_round_trip, build_check_program,
                         check_multipliers, manifest_values, needs_cc, read_dump, run_cc, tables_match_manifest)

HOSTILE = {
    "input": 'in"put */ \\ \u00e9\n',
    "conv1": 'conv "1" */ /* \\ ??= \u00e9\nline',
    "relu1": "??( relu6 ??/",
    "pool": "pool/*",
    "conv2": "\u00e9\u00e9\u00e9",          # nothing left after sanitising
    "add": "a-b",
    "mul": "a_b",                            # the same identifier stem as "a-b"
    "avg": "x" * 300,                        # longer than the 200 bytes kept in C
    "cat": "cat\ttab",
    "clamp": "clamp \\\\ \"\"",
    "gap": "gap\\",
    "flat": "flat?",
    "fc": 'fc"',
}


class _Builder:
    """Q/DQ pairs, int8 weights with per-channel scales and int32 biases at input scale x weight scale."""

    def __init__(self, seed: int, per_tensor: bool = False):
        self.rng = np.random.default_rng(seed)
        self.per_tensor = per_tensor          # one weight scale per layer, as `qfit check --per-tensor` writes
        self.nodes, self.inits, self.scales = [], [], {}

    def const(self, name, value):
        self.inits.append(numpy_helper.from_array(np.asarray(value), name))
        return name

    def quantized(self, tensor: str, scale: float, zero: int) -> str:
        """Store `tensor` as int8: QuantizeLinear then DequantizeLinear; returns what consumers read."""
        self.scales[tensor] = np.float32(scale)
        s = self.const(tensor + "_s", np.float32(scale))
        z = self.const(tensor + "_z", np.int8(zero))
        self.nodes.append(helper.make_node("QuantizeLinear", [tensor, s, z], [tensor + "_q"], name=tensor + "_Q"))
        self.nodes.append(helper.make_node("DequantizeLinear", [tensor + "_q", s, z], [tensor + "_dq"],
                                           name=tensor + "_DQ"))
        return tensor + "_dq"

    def weights(self, tag: str, shape: tuple, x_tensor: str, bias: bool = True) -> list[str]:
        q = self.rng.integers(-127, 128, size=shape).astype(np.int8)
        channels = () if self.per_tensor else (shape[0],)
        s_w = self.rng.uniform(0.002, 0.01, size=channels).astype(np.float32)
        self.nodes.append(helper.make_node(
            "DequantizeLinear", [self.const(tag + "_wq", q), self.const(tag + "_ws", s_w),
                                 self.const(tag + "_wz", np.zeros(channels, np.int8))], [tag + "_w"], axis=0))
        names = [tag + "_w"]
        if bias:
            s_b = (self.scales[x_tensor] * s_w).astype(np.float32)
            b = self.rng.integers(-2000, 2000, size=shape[0]).astype(np.int32)
            self.nodes.append(helper.make_node(
                "DequantizeLinear", [self.const(tag + "_bq", b), self.const(tag + "_bs", s_b),
                                     self.const(tag + "_bz", np.zeros(channels, np.int32))], [tag + "_b"], axis=0))
            names.append(tag + "_b")
        return names

    def node(self, op, inputs, output, name, **attrs):
        self.nodes.append(helper.make_node(op, inputs, [output], name=name, **attrs))
        return output


def hostile_model(names: dict = HOSTILE, extra_op: str | None = None, per_tensor: bool = False) -> onnx.ModelProto:
    """Conv+ReLU6 -> MaxPool (shared quantizer) -> depthwise Conv -> Add -> Mul -> AveragePool (pads not
    counted) -> Concat (two input scales) -> Relu alone -> GlobalAveragePool -> Flatten -> Gemm."""
    b = _Builder(seed=7, per_tensor=per_tensor)
    x = b.quantized(names["input"], 0.03, -3)
    c1 = b.node("Conv", [x, *b.weights("c1", (4, 3, 3, 3), names["input"])], "c1", names["conv1"], pads=[1, 1, 1, 1])
    # ReLU6 into a symmetric quantizer (as `qfit check --symmetric` writes): both bounds inside int8
    six = [b.const("zero", np.float32(0.0)), b.const("six", np.float32(6.0))]
    r1 = b.quantized(b.node("Clip", [c1, *six], "r1 \"out\"", names["relu1"]), 0.05, 0)
    mp = b.quantized(b.node("MaxPool", [r1], "mp", names["pool"], kernel_shape=[2, 2], strides=[2, 2]), 0.05, 0)
    c2 = b.quantized(b.node("Conv", [mp, *b.weights("c2", (4, 1, 3, 3), "mp")], "c2", names["conv2"], group=4,
                            pads=[1, 1, 1, 1]), 0.04, 5)
    add = b.quantized(b.node("Add", [mp, c2], "add", names["add"]), 0.07, -10)
    mul = b.quantized(b.node("Mul", [add, mp], "mul", names["mul"]), 0.2, -20)
    avg = b.quantized(b.node("AveragePool", [mul], "avg", names["avg"], kernel_shape=[3, 3], pads=[1, 1, 1, 1]),
                      0.15, -15)
    cat = b.quantized(b.node("Concat", [avg, add], "cat", names["cat"], axis=1), 0.1, -8)
    last = b.quantized(b.node("Relu", [cat], "clamped", names["clamp"]), 0.06, -128)
    if extra_op:
        last = b.quantized(b.node(extra_op, [last], "extra", "extra " + extra_op), 0.01, 0)
    gap = b.quantized(b.node("GlobalAveragePool", [last], "gap", names["gap"]), 0.02, -100)
    flat = b.quantized(b.node("Flatten", [gap], "flat", names["flat"]), 0.02, -100)
    b.node("Gemm", [flat, *b.weights("fc", (5, 8), "flat")], "logits_f", names["fc"], transB=1)
    b.quantized("logits_f", 0.1, 0)
    b.nodes[-1].output[0] = "logits"
    graph = helper.make_graph(b.nodes, "hostile",
                              [helper.make_tensor_value_info(names["input"], TensorProto.FLOAT, [1, 3, 8, 8])],
                              [helper.make_tensor_value_info("logits", TensorProto.FLOAT, [1, 5])], b.inits)
    return helper.make_model(graph, opset_imports=[helper.make_opsetid("", 21)], ir_version=10)


@pytest.fixture(scope="module")
def hostile(tmp_path_factory):
    out = tmp_path_factory.mktemp("export_hostile")
    model = hostile_model()
    onnx.checker.check_model(model)
    path = out / "hostile_int8.onnx"
    onnx.save(model, str(path))
    assert main(["export", str(path), "--out", str(out / "c"), "--prefix", "tray_cam", "--export-alignment", "32"]) == 0
    manifest = json.load(open(out / "c" / "tray_cam.json"))
    return {"dir": out / "c", "model": model, "manifest": manifest, "work": out / "work"}


def test_every_layer_kind_is_exported(hostile):
    kinds = [layer["kind"] for layer in hostile["manifest"]["layers"]]
    assert set(kinds) == {"CONV", "MAX_POOL", "ADD", "MUL", "AVERAGE_POOL", "CONCAT", "CLAMP",
                          "GLOBAL_AVERAGE_POOL", "RESHAPE", "FULLY_CONNECTED"}
    by_kind = {}
    for layer in hostile["manifest"]["layers"]:
        by_kind.setdefault(layer["kind"], layer)     # the first of each kind
    assert by_kind["CONV"]["fused_activation"] == HOSTILE["relu1"]       # ReLU6 folded into the clamp
    # QuantizeLinear's own rounding of the bounds: 0 / 0.05 + 0 = 0 and 6 / 0.05 + 0 = 120 (ONNX spec)
    assert (by_kind["CONV"]["act_min"], by_kind["CONV"]["act_max"]) == (0, 120)
    avg = by_kind["AVERAGE_POOL"]      # corners see 4 of 9 values, edges 6, the middle 9: one factor each
    assert next(a for a in hostile["manifest"]["arrays"] if a["name"] == avg["multipliers"])["count"] == 16
    assert by_kind["MAX_POOL"]["multipliers"] is None                     # shared quantizer: bytes move
    assert check_multipliers(hostile["model"], hostile["manifest"]) > 20
    clamp = by_kind["CLAMP"]
    assert clamp["multipliers"] is None and clamp["table"] is not None


def test_names_are_kept_in_full_in_the_manifest(hostile):
    layer_names = [layer["name"] for layer in hostile["manifest"]["layers"]]
    assert HOSTILE["conv1"] in layer_names and HOSTILE["avg"] in layer_names
    assert HOSTILE["input"] == hostile["manifest"]["tensors"][0]["name"]


def c_comments(text: str) -> list[str]:
    """The comments of C source, as a C99 translator splits them (6.4.9): outside string literals."""
    comments, i = [], 0
    while i < len(text):
        if text[i] == '"':
            i += 1
            while text[i] != '"':
                i += 2 if text[i] == "\\" else 1
            i += 1
        elif text.startswith("/*", i):
            end = text.index("*/", i + 2)
            comments.append(text[i + 2:end])
            i = end + 2
        else:
            assert not text.startswith("//", i)
            i += 1
    return comments


def test_identifiers_are_valid_unique_and_comments_hold_no_model_text(hostile):
    names = [a["name"] for a in hostile["manifest"]["arrays"]]
    assert len(set(names)) == len(names)
    for name in names:   # C99 6.4.2: letters, digits, underscore; 63 significant characters (5.2.4.1)
        assert re.fullmatch(r"tray_cam_l\d+(_[a-z0-9]+)*_[wbmst]", name) and len(name) <= 63, name
    source = (hostile["dir"] / "tray_cam.c").read_text(encoding="ascii")   # every byte outside ASCII escaped
    header = (hostile["dir"] / "tray_cam.h").read_text(encoding="ascii")
    for text in (source, header):
        for comment in c_comments(text):
            # generated text only: no quote, backslash or question mark, which every hostile name holds
            assert re.fullmatch(r"[\x20-\x7e\n]*", comment) and not set(comment) & set('"\\?'), comment
    assert "??" not in source.replace("\\?", "")


@needs_cc
def test_hostile_names_compile_as_strict_c99_and_read_back_byte_for_byte(hostile):
    work = hostile["work"]
    work.mkdir(exist_ok=True)
    run_cc(["-c", str(hostile["dir"] / "tray_cam.c"), "-o", str(work / "tray_cam.o")], cwd=work)
    exe = build_check_program(hostile["dir"], hostile["model"], hostile["manifest"], work)
    result = subprocess.run([exe, str(work / "dump.bin")], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    tables_match_manifest(result.stdout, hostile["manifest"])
    arrays, strings = read_dump(work / "dump.bin", hostile["manifest"])
    wanted = [t["name"] for t in hostile["manifest"]["tensors"]] + [y["name"] for y in hostile["manifest"]["layers"]]
    for got, name in zip(strings, wanted):
        data = name.encode("utf-8")
        assert got == (data if len(data) <= 200 else data[:200] + b"..."), name
    for array in hostile["manifest"]["arrays"]:
        assert np.array_equal(arrays[array["name"]], manifest_values(array))
    manifest = hostile["manifest"]   # --export-alignment 32: the C program checked every address
    assert manifest["flash"]["param_bytes_aligned"] == sum(-(-a["bytes"] // 32) * 32 for a in manifest["arrays"])


def _planted(hostile, tmp_path, edit) -> subprocess.CompletedProcess:
    """The C check program run against a copy of the export whose source `edit` changed."""
    export = tmp_path / "planted"
    export.mkdir(parents=True)
    for name in ("tray_cam.h", "tray_cam.c"):
        text = (hostile["dir"] / name).read_text()
        (export / name).write_text(edit(text) if name.endswith(".c") else text)
    exe = build_check_program(export, hostile["model"], hostile["manifest"], tmp_path / "work")
    return subprocess.run([exe], capture_output=True, text=True)


@needs_cc
def test_the_c_checks_catch_a_changed_weight_and_an_overlapping_tensor(hostile, tmp_path):
    manifest = hostile["manifest"]
    first = manifest["arrays"][0]["name"]

    def change_weight(text):
        head, _, rest = text.partition(f"{first}[] TRAY_CAM_ALIGNED = {{\n    ")
        value, _, tail = rest.partition(",")
        return f"{head}{first}[] TRAY_CAM_ALIGNED = {{\n    {int(value) ^ 1}," + tail
    result = _planted(hostile, tmp_path / "w", change_weight)
    assert result.returncode == 1 and f"{first}: checksum" in result.stderr

    tensors = manifest["tensors"]
    a, b = next((a, b) for a in tensors for b in tensors if a["buffer"] != b["buffer"] and a["index"] < b["index"]
                and a["first_step"] <= b["last_step"] and b["first_step"] <= a["last_step"])

    def overlap(text):   # give tensor b tensor a's offset: both live at one step
        pattern = rf"(\{{ /\* tensor {b['index']} \*/ \"(?:[^\"\\]|\\.)*\", ){b['arena_offset']}u"
        changed, count = re.subn(pattern, rf"\g<1>{a['arena_offset']}u", text)
        assert count == 1
        return changed
    result = _planted(hostile, tmp_path / "o", overlap)
    assert result.returncode == 1 and f"overlap: tensors {a['index']} and {b['index']}" in result.stderr


def test_multipliers_and_shifts_are_those_the_integer_path_runs(hostile):
    pytest.importorskip("qfit.measure.integer", reason="the integer evaluation path is not installed")
    with_factors = sum(layer["multipliers"] is not None for layer in hostile["manifest"]["layers"])
    assert assert_factors_are_the_integer_paths(hostile["model"], hostile["manifest"]) == with_factors == 8


def test_a_lone_clamp_is_the_integer_paths_table_on_every_input(hostile):
    pytest.importorskip("qfit.measure.integer", reason="the integer evaluation path is not installed")
    from qfit.measure.integer import IntegerProgram

    manifest = hostile["manifest"]
    layer = next(y for y in manifest["layers"] if y["kind"] == "CLAMP")
    table = next(manifest_values(a) for a in manifest["arrays"] if a["name"] == layer["table"])
    (t_in,), t_out = [manifest["tensors"][i] for i in layer["inputs"]], manifest["tensors"][layer["output"]]
    # the model's own clamp node between the two quantizers, fed every int8 value once
    node = next(n for n in hostile["model"].graph.node if n.name == layer["name"])
    one = onnx.helper.make_node(node.op_type, ["x_dq", *node.input[1:]], ["y"], name="clamp")
    grids = [numpy_helper.from_array(np.float32(t["scale"]), f"s{i}") for i, t in enumerate((t_in, t_out))]
    grids += [numpy_helper.from_array(np.int8(t["zero_point"]), f"z{i}") for i, t in enumerate((t_in, t_out))]
    grids += [i for i in hostile["model"].graph.initializer if i.name in node.input[1:]]   # Clip bounds
    graph = helper.make_graph(
        [helper.make_node("QuantizeLinear", ["x", "s0", "z0"], ["x_q"]),
         helper.make_node("DequantizeLinear", ["x_q", "s0", "z0"], ["x_dq"]), one,
         helper.make_node("QuantizeLinear", ["y", "s1", "z1"], ["y_q"])], "clamp",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [256])],
        [helper.make_tensor_value_info("y_q", TensorProto.INT8, [256])], grids)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 21)])
    every = np.arange(-128, 128)
    x = ((every - t_in["zero_point"]).astype(np.float32) * np.float32(t_in["scale"])).astype(np.float32)
    program = IntegerProgram(model)
    assert program.float_nodes == []
    assert np.array_equal(program.run({"x": x}, ["y_q"])["y_q"], table)
    assert len(np.unique(table)) > 100 and table[0] == layer["act_min"]   # rescaled (not a copy), clamped


def test_every_layer_kind_round_trips_through_the_integer_path(hostile):
    pytest.importorskip("qfit.measure.integer", reason="the integer evaluation path is not installed")
    manifest = hostile["manifest"]
    arrays = {a["name"]: manifest_values(a) for a in manifest["arrays"]}
    feeds = np.random.default_rng(3).normal(0, 1.5, size=(6, 3, 8, 8)).astype(np.float32)
    (logits,) = assert_round_trip(hostile["model"], manifest, arrays, feeds).values()
    assert logits.shape == (6, 5) and len(np.unique(logits)) > 5


def test_per_tensor_weights_give_one_factor_per_layer_and_round_trip(tmp_path):
    pytest.importorskip("qfit.measure.integer", reason="the integer evaluation path is not installed")
    model = hostile_model(per_tensor=True)
    onnx.save(model, str(tmp_path / "m.onnx"))
    assert main(["export", str(tmp_path / "m.onnx"), "--out", str(tmp_path / "c")]) == 0
    manifest = json.load(open(tmp_path / "c" / "qmodel.json"))
    counts = {a["name"]: a["count"] for a in manifest["arrays"]}
    weighted = [layer for layer in manifest["layers"] if layer["kind"] in ("CONV", "FULLY_CONNECTED")]
    assert [counts[layer["multipliers"]] for layer in weighted] == [1, 1, 1]
    assert [counts[layer["bias"]] for layer in weighted] == [4, 4, 5]
    assert check_multipliers(model, manifest) > 10
    assert_factors_are_the_integer_paths(model, manifest)
    feeds = np.random.default_rng(5).normal(0, 1.5, size=(4, 3, 8, 8)).astype(np.float32)
    assert_round_trip(model, manifest, {a["name"]: manifest_values(a) for a in manifest["arrays"]}, feeds)


def _refused(capsys, args, out) -> str:
    code = main(args)
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err
    assert not os.path.exists(out)
    return err


def test_refusals_are_one_line_and_write_nothing(tmp_path, capsys):
    model = tmp_path / "m.onnx"
    onnx.save(hostile_model(extra_op="Sigmoid"), str(model))   # an int8 layer no exported kind covers
    err = _refused(capsys, ["export", str(model), "--out", str(tmp_path / "a")], tmp_path / "a")
    assert "extra Sigmoid" in err and "no layer kind" in err
    float_model = tmp_path / "f.onnx"
    onnx.save(helper.make_model(helper.make_graph(
        [helper.make_node("Relu", ["x"], ["y"])], "f", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 4])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4])]), opset_imports=[helper.make_opsetid("", 21)]),
        str(float_model))
    err = _refused(capsys, ["export", str(float_model), "--out", str(tmp_path / "b")], tmp_path / "b")
    assert "not a QDQ model" in err
    onnx.save(hostile_model(), str(model))
    assert "--prefix" in _refused(capsys, ["export", str(model), "--out", str(tmp_path / "c"), "--prefix", "_x"],
                                  tmp_path / "c")
    assert "--export-alignment" in _refused(capsys, ["export", str(model), "--out", str(tmp_path / "d"),
                                                     "--export-alignment", "24"], tmp_path / "d")
    named_like_an_output = tmp_path / "e" / "qmodel.json"     # the input is never overwritten
    named_like_an_output.parent.mkdir()
    onnx.save(hostile_model(), str(named_like_an_output), format="protobuf")
    before = named_like_an_output.read_bytes()
    assert main(["export", str(named_like_an_output), "--out", str(tmp_path / "e")]) == 2
    assert "would overwrite the input model" in capsys.readouterr().err
    assert named_like_an_output.read_bytes() == before and sorted(os.listdir(tmp_path / "e")) == ["qmodel.json"]
