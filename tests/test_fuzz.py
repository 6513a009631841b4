"""Property-based tests: whatever a user types or whatever bytes a model file holds, qfit either
accepts it or raises QfitError (the CLI's one-line message, exit 2), never anything else.

The model cases mutate a valid model two ways: raw bytes (what a damaged download gives) and parsed
fields (what a buggy exporter gives, which gets past the protobuf parser and into the loader).
Python warnings count as failures: a real run would print them as extra stderr lines.
"""
from __future__ import annotations

import os
import signal
import warnings

import numpy as np
import onnx
import pytest
from hypothesis import HealthCheck, example, given, settings
from hypothesis import strategies as st
from onnx import TensorProto, helper, numpy_helper

from qfit.cli import main
from qfit.data import MAX_CLASS_INDEX, parse_labels_csv
from qfit.errors import QfitError
from qfit.graph.load import MAX_DIM, LoadedModel, load_model, parse_input_shapes
from qfit.sizes import MAX_SIZE_BYTES, parse_size

FAST = settings(max_examples=100, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
UNITS = {"": 1, "B": 1, "k": 1024, "KB": 1024, "KiB": 1024, "M": 1024 ** 2, "MiB": 1024 ** 2, "mb": 1024 ** 2,
         "G": 1024 ** 3, "GiB": 1024 ** 3}


@pytest.fixture(autouse=True)
def _warnings_are_errors():
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        yield


# ------------------------------------------------------------------------------ sizes

@FAST
@given(st.text(max_size=60))
@example("9" * 400)          # a float of this is inf
@example("1" * 5000)         # int() refuses more than 4300 digits
@example("256QB")
@example("1.5")
@example("0.5k")
def test_parse_size_returns_bytes_or_raises_qfit_error(text):
    try:
        value = parse_size(text, "--sram")
    except QfitError as e:
        assert str(e).startswith("--sram: ")
        return
    assert isinstance(value, int) and 0 <= value <= MAX_SIZE_BYTES


@FAST
@given(st.integers(0, 2 ** 32), st.sampled_from(sorted(UNITS)), st.sampled_from(["", " "]))
def test_parse_size_reads_whole_numbers_with_any_unit(number, unit, space):
    assert parse_size(f"{number}{space}{unit}") == number * UNITS[unit]  # 2**32 GiB is still < 8 EiB


def test_parse_size_refuses_more_than_8_eib():
    assert parse_size(f"{2 ** 63 - 1}") == MAX_SIZE_BYTES
    with pytest.raises(QfitError, match="larger than any memory"):
        parse_size(f"{2 ** 33}G")


@FAST
@given(st.from_regex(r"\A[0-9]{1,30}(\.[0-9]{1,30})?\s?[a-zA-Z]{0,4}\Z"))
def test_parse_size_on_number_like_text(text):
    try:
        assert 0 <= parse_size(text) <= MAX_SIZE_BYTES
    except QfitError:
        pass


# ------------------------------------------------------------------------------ shape overrides

@FAST
@given(st.lists(st.text(max_size=40), max_size=3))
@example(["x=1x" + "9" * 5000])
@example(["x=0x3"])
@example(["=1x2"])
def test_parse_input_shapes_returns_shapes_or_raises_qfit_error(specs):
    try:
        shapes = parse_input_shapes(specs)
    except QfitError as e:
        assert str(e).startswith("--input-shape: ")
        return
    for name, dims in shapes.items():
        assert name and all(isinstance(d, int) and 0 < d <= MAX_DIM for d in dims)


_NAMES = st.text(st.sampled_from("abcxyz_.:/0123456789"), min_size=1, max_size=12)


@FAST
@given(_NAMES, st.lists(st.integers(1, MAX_DIM), min_size=1, max_size=6), st.sampled_from(["x", ","]))
def test_parse_input_shapes_reads_what_it_documents(name, dims, separator):
    spec = f"{name}={separator.join(map(str, dims))}"
    assert parse_input_shapes([spec]) == {name: tuple(dims)}


# ------------------------------------------------------------------------------ labels CSV

_CSV_FILES = ["a.npy", "b.npy", "sub/c.png", "./a.npy", "sub/../b.npy", "../a.npy", "/etc/a.npy", "C:\\a.npy",
              "missing.npy", "notes.txt", "a\x00.npy", "", " a.npy "]
_CSV_LABELS = ["0", "1", "3", "4", "-1", "007", "cat", "dog", "", "\u0663", "1_0", "9" * 30, "9" * 5000]
_DATA_FILES = {"a.npy", "b.npy", "sub/c.png"}


def _cell(text, quote):
    return '"' + text.replace('"', '""') + '"' if quote else text


@FAST
@given(st.lists(st.tuples(st.sampled_from(_CSV_FILES), st.sampled_from(_CSV_LABELS), st.booleans(),
                          st.sampled_from(["", ",extra"])), max_size=6),
       st.booleans(), st.sampled_from([None, 4]))
def test_labels_csv_rows_give_files_inside_the_folder_or_a_qfit_error(rows, header, num_classes):
    lines = (["file,label"] if header else []) + [
        f"{_cell(f, quote)},{_cell(label, quote)}{extra}" for f, label, quote, extra in rows]
    try:
        files, labels, names = parse_labels_csv("\n".join(lines) + "\n", "labels.csv", _DATA_FILES,
                                                num_classes=num_classes)
    except QfitError as e:
        assert str(e).startswith("labels.csv: ")
        return
    assert files == sorted(set(files)) and set(files) <= _DATA_FILES  # never outside the data folder
    assert len(labels) == len(files)
    bound = num_classes if num_classes is not None else MAX_CLASS_INDEX + 1
    assert all(0 <= label < bound for label in labels)
    if names is not None:
        assert all(label < len(names) for label in labels)


@FAST
@given(st.text(max_size=200), st.sets(st.sampled_from(sorted(_DATA_FILES)), max_size=3))
def test_labels_csv_on_any_text_gives_labels_or_a_qfit_error(text, data_files):
    try:
        files, labels, _ = parse_labels_csv(text, "labels.csv", data_files)
    except QfitError:
        return
    assert set(files) <= data_files and len(labels) == len(files)


# ------------------------------------------------------------------------------ the model loader

def _valid_model_bytes() -> bytes:
    """Conv + BatchNormalization + Relu + Identity + Constant + Mul + pool + Reshape: every cleaning
    step of the loader has something to do."""
    rng = np.random.default_rng(0)
    inits = [numpy_helper.from_array(rng.standard_normal((4, 3, 3, 3)).astype(np.float32), "w"),
             numpy_helper.from_array(np.zeros(4, np.float32), "b"),
             numpy_helper.from_array(np.array([1, -1], np.int64), "shape")]
    inits += [numpy_helper.from_array((np.abs(rng.standard_normal(4)) + 0.1).astype(np.float32), name)
              for name in ("gamma", "beta", "mean", "var")]
    nodes = [helper.make_node("Conv", ["x", "w", "b"], ["conv"], pads=[1, 1, 1, 1], name="conv"),
             helper.make_node("BatchNormalization", ["conv", "gamma", "beta", "mean", "var"], ["bn"], name="bn"),
             helper.make_node("Relu", ["bn"], ["relu"], name="relu"),
             helper.make_node("Identity", ["relu"], ["same"], name="identity"),
             helper.make_node("Constant", [], ["half"],
                              value=numpy_helper.from_array(np.full((1, 4, 1, 1), 0.5, np.float32))),
             helper.make_node("Mul", ["same", "half"], ["scaled"]),
             helper.make_node("GlobalAveragePool", ["scaled"], ["pool"]),
             helper.make_node("Reshape", ["pool", "shape"], ["y"])]
    graph = helper.make_graph(nodes, "fuzz_base", [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, 8, 8])],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 9
    onnx.checker.check_model(model)
    return model.SerializeToString()


VALID_MODEL = _valid_model_bytes()


def _load_or_refuse(path):
    try:
        assert isinstance(load_model(path), LoadedModel)
    except QfitError as e:
        assert str(e).startswith(("model: ", "--input-shape: ")) and "\n" not in str(e)


_BYTE_EDITS = st.lists(st.tuples(st.sampled_from(["set", "insert", "delete"]), st.integers(0, len(VALID_MODEL) - 1),
                                 st.binary(min_size=1, max_size=4)), min_size=1, max_size=4)


def _apply_byte_edits(edits) -> bytes:
    data = bytearray(VALID_MODEL)
    for kind, position, blob in edits:
        position %= max(len(data), 1)
        if kind == "set":
            data[position:position + len(blob)] = blob
        elif kind == "insert":
            data[position:position] = blob
        else:
            del data[position:position + len(blob)]
    return bytes(data)


def test_the_unmutated_model_loads(tmp_path):
    path = tmp_path / "valid.onnx"
    path.write_bytes(VALID_MODEL)
    assert load_model(str(path)).input_names == ["x"]


@FAST
@given(_BYTE_EDITS)
def test_loader_on_mutated_bytes_loads_or_refuses(tmp_path, edits):
    path = tmp_path / "mutated.onnx"
    path.write_bytes(_apply_byte_edits(edits))
    _load_or_refuse(str(path))


@FAST
@given(st.integers(0, len(VALID_MODEL) - 1))
def test_loader_on_truncated_bytes_loads_or_refuses(tmp_path, length):
    path = tmp_path / "cut.onnx"
    path.write_bytes(VALID_MODEL[:length])
    _load_or_refuse(str(path))


_OP_TYPES = ["Conv", "Relu", "Add", "Div", "BatchNormalization", "Reshape", "Flatten", "Gemm", "MatMul",
             "Transpose", "Concat", "Identity", "Dropout", "Constant", "MaxPool", "Clip", "Pad", "Slice",
             "Squeeze", "Shape", "Gather", "Cast", "ConvTranspose", "NoSuchOp"]
_ATTRIBUTES = st.tuples(st.sampled_from(["axis", "pads", "strides", "group", "kernel_shape", "epsilon", "perm",
                                         "to", "transB", "auto_pad"]),
                        st.sampled_from([0, 1, 2, -1, 3.5, [1, 1], [0, 0, 0, 0], [2, 2], "SAME_UPPER", [1, 0, 2, 3]]))
_FIELD_EDITS = st.lists(st.one_of(
    st.tuples(st.just("op_type"), st.integers(0, 7), st.sampled_from(_OP_TYPES)),
    st.tuples(st.just("opset"), st.sampled_from([1, 5, 7, 9, 11, 13, 18, 21, 22, 99])),
    st.tuples(st.just("rewire"), st.integers(0, 7), st.integers(0, 4), st.integers(0, 20)),
    st.tuples(st.just("attribute"), st.integers(0, 7), _ATTRIBUTES),
    st.tuples(st.just("input_dim"), st.integers(0, 3), st.sampled_from([0, 1, 2, 7, 100000, "N"])),
    st.tuples(st.just("input_type"), st.sampled_from([2, 6, 7, 10, 11, 16, 99])),
    st.tuples(st.just("drop_node"), st.integers(0, 7)),
    st.tuples(st.just("tensor_value"), st.integers(0, 6), st.sampled_from([np.inf, -np.inf, np.nan, 1e38, 0.0, -1.0])),
    st.tuples(st.just("tensor_shape"), st.integers(0, 6), st.lists(st.integers(0, 5), max_size=4)),
), min_size=1, max_size=3)


def _apply_field_edits(edits) -> bytes:
    model = onnx.ModelProto.FromString(VALID_MODEL)
    graph = model.graph
    for edit in edits:
        kind = edit[0]
        if kind == "op_type" and edit[1] < len(graph.node):
            graph.node[edit[1]].op_type = edit[2]
        elif kind == "opset":
            model.opset_import[0].version = edit[1]
        elif kind == "rewire" and edit[1] < len(graph.node):
            node = graph.node[edit[1]]
            names = [o for n in graph.node for o in n.output] + [i.name for i in graph.initializer] + ["x", ""]
            if node.input:
                node.input[edit[2] % len(node.input)] = names[edit[3] % len(names)]
        elif kind == "attribute" and edit[1] < len(graph.node):
            graph.node[edit[1]].attribute.append(helper.make_attribute(*edit[2]))
        elif kind == "input_dim":
            dim = graph.input[0].type.tensor_type.shape.dim[edit[1]]
            if edit[2] == "N":
                dim.dim_param = "N"
            else:
                dim.dim_value = edit[2]
        elif kind == "input_type":
            graph.input[0].type.tensor_type.elem_type = edit[1]
        elif kind == "drop_node" and edit[1] < len(graph.node):
            del graph.node[edit[1]]
        elif kind in ("tensor_value", "tensor_shape") and edit[1] < len(graph.initializer):
            tensor = graph.initializer[edit[1]]
            array = numpy_helper.to_array(tensor).copy()
            if kind == "tensor_value" and array.dtype.kind == "f" and array.size:
                array.flat[0] = edit[2]
            elif kind == "tensor_shape":
                array = np.resize(array, int(np.prod(edit[2]))).reshape(edit[2]).astype(array.dtype)
            tensor.CopyFrom(numpy_helper.from_array(array, tensor.name))
    return model.SerializeToString()


@FAST
@given(_FIELD_EDITS)
def test_loader_on_mutated_fields_loads_or_refuses(tmp_path, edits):
    path = tmp_path / "edited.onnx"
    path.write_bytes(_apply_field_edits(edits))
    _load_or_refuse(str(path))


# ------------------------------------------------------------------------------ through the CLI

def _cli(capfd, args):
    saved = signal.getsignal(signal.SIGTERM)  # main() maps SIGTERM to KeyboardInterrupt
    try:
        code = main([str(a) for a in args])
    finally:
        signal.signal(signal.SIGTERM, saved)
    _, stderr = capfd.readouterr()
    return code, stderr


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(_BYTE_EDITS)
def test_budget_command_on_mutated_models_exits_0_1_or_2_with_one_line(tmp_path, capfd, edits):
    path = tmp_path / "mutated.onnx"
    path.write_bytes(_apply_byte_edits(edits))
    code, stderr = _cli(capfd, ["budget", path, "--flash", "1MiB", "--sram", "1MiB", "--no-order-search"])
    assert code in (0, 1, 2)
    if code == 2:
        assert len(stderr.splitlines()) == 1 and stderr.startswith("qfit: error: "), stderr


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.text(max_size=40))
@example("256QB")
@example("1\nK")
def test_check_command_with_any_sram_text_refuses_in_one_line(tmp_path, capfd, text):
    # --calib names no folder, so a text that does parse still ends in a one-line refusal, before any work
    path = tmp_path / "valid.onnx"
    path.write_bytes(VALID_MODEL)
    code, stderr = _cli(capfd, ["check", path, "--calib", tmp_path / "no_such_folder", "--flash", "1MiB",
                                f"--sram={text}", "--out", tmp_path / "out"])
    assert code == 2
    assert len(stderr.splitlines()) == 1 and stderr.startswith("qfit: error: "), stderr
    assert not os.path.exists(tmp_path / "out")
