"""The bad-input table (docs/bad-input.md), one test per row, through the real CLI entry point.

Every refusal must be: exit code 2, exactly one stderr line starting "qfit: error:" that names what is
wrong and where, nothing on stdout, no traceback, no Python warning (a real run would print it as more
stderr lines), and the --out folder exactly as it was before the run (if it did not exist, it still
does not). `main()` is called in-process with file-descriptor capture, so output written by the C++
libraries underneath (onnx, onnxruntime) would be caught too.
"""
from __future__ import annotations

import json
import os
import pickle
import signal
import warnings

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper
from PIL import Image

from qfit.cli import main

SIZES = ["--flash", "1MiB", "--sram", "256KiB"]
INPUT_SHAPE = (1, 3, 8, 8)
CLASSES = 4


# ------------------------------------------------------------------------------ builders

def conv_model(input_dims=INPUT_SHAPE, opset=17, name="net.onnx", folder=None, extra_nodes=()):
    """Conv 3->4 (3x3, pad 1) -> Relu -> GlobalAveragePool -> Flatten: a 4-class classifier."""
    rng = np.random.default_rng(0)
    weight = numpy_helper.from_array((rng.standard_normal((CLASSES, 3, 3, 3)) * 0.3).astype(np.float32), "w")
    bias = numpy_helper.from_array(np.zeros(CLASSES, np.float32), "b")
    graph = helper.make_graph(
        [helper.make_node("Conv", ["x", "w", "b"], ["conv"], pads=[1, 1, 1, 1]),
         helper.make_node("Relu", ["conv"], ["relu"]),
         helper.make_node("GlobalAveragePool", ["relu"], ["pool"]),
         helper.make_node("Flatten", ["pool"], ["y"])],
        "conv_net", [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(input_dims))],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, CLASSES])], [weight, bias])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 9
    path = os.path.join(str(folder), name)
    onnx.save(model, path)
    return path


def save_model(model, path):
    onnx.save(model, str(path))
    return str(path)


def npy_folder(folder, count=4, shape=INPUT_SHAPE, seed=0):
    os.makedirs(folder, exist_ok=True)
    rng = np.random.default_rng(seed)
    for i in range(count):
        np.save(os.path.join(folder, f"sample_{i:03d}.npy"), rng.standard_normal(shape).astype(np.float32))
    return str(folder)


def write_png(path, height, width, seed=0):
    os.makedirs(os.path.dirname(path), exist_ok=True)
    pixels = np.random.default_rng(seed).integers(0, 256, (height, width, 3), dtype=np.uint8)
    Image.fromarray(pixels).save(path)
    return str(path)


class _OpensAFileWhenUnpickled:
    """A hostile object: unpickling it calls open(marker, 'w'), which would create the marker file."""

    def __init__(self, marker):
        self.marker = marker

    def __reduce__(self):
        return (open, (self.marker, "w"))


# ------------------------------------------------------------------------------ running the CLI

@pytest.fixture(autouse=True)
def _keep_sigterm_handler():
    """main() maps SIGTERM to KeyboardInterrupt; restore the test process's own handler afterwards."""
    saved = signal.getsignal(signal.SIGTERM)
    yield
    signal.signal(signal.SIGTERM, saved)


def snapshot(folder):
    """Everything under `folder` (relative path -> bytes), or None if it does not exist."""
    folder = str(folder)
    if not os.path.lexists(folder):
        return None
    if not os.path.isdir(folder):
        with open(folder, "rb") as f:
            return {".": f.read()}
    found = {}
    for root, _, names in os.walk(folder):
        for name in names:
            path = os.path.join(root, name)
            with open(path, "rb") as f:
                found[os.path.relpath(path, folder)] = f.read()
    return found


def run_qfit(capfd, args):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        code = main([str(a) for a in args])
    out, err = capfd.readouterr()
    return code, out, err, [str(w.message) for w in caught]


def check_args(model, calib, out, *extra):
    return ["check", model, "--calib", calib, *SIZES, "--out", out, "--quiet", *extra]


def assert_refused(capfd, args, out, *fragments):
    """Run the CLI and pin down the refusal contract; return the message line."""
    before = snapshot(out)
    code, stdout, stderr, warned = run_qfit(capfd, args)
    lines = stderr.splitlines()
    assert code == 2, (code, stderr)
    assert len(lines) == 1, f"expected one stderr line, got {stderr!r}"
    message = lines[0]
    assert message.startswith("qfit: error: "), message
    assert "Traceback" not in stderr + stdout
    assert stdout == "", stdout
    assert not warned, warned
    for fragment in fragments:
        assert str(fragment) in message, f"{fragment!r} not in {message!r}"
    assert snapshot(out) == before, "the output folder changed on a refused run"
    return message


@pytest.fixture
def calib(tmp_path):
    return npy_folder(tmp_path / "calib")


@pytest.fixture
def model(tmp_path):
    return conv_model(folder=tmp_path)


# ------------------------------------------------------------------------------ the model file

def test_bad_input_missing_model_file(tmp_path, capfd, calib):
    missing = tmp_path / "nope.onnx"
    assert_refused(capfd, check_args(missing, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {missing}: no such file")


def test_bad_input_directory_given_as_model(tmp_path, capfd, calib):
    folder = tmp_path / "a_folder.onnx"
    folder.mkdir()
    assert_refused(capfd, check_args(folder, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {folder}: is a directory, not an ONNX file")


def test_bad_input_empty_model_file(tmp_path, capfd, calib):
    empty = tmp_path / "empty.onnx"
    empty.write_bytes(b"")
    assert_refused(capfd, check_args(empty, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {empty}: file is empty")


def test_bad_input_truncated_onnx_file(tmp_path, capfd, calib, model):
    data = open(model, "rb").read()
    cut = tmp_path / "cut.onnx"
    cut.write_bytes(data[: len(data) // 2])
    assert_refused(capfd, check_args(cut, calib, tmp_path / "out"), tmp_path / "out", f"model: {cut}:")


def test_bad_input_png_renamed_onnx(tmp_path, capfd, calib):
    fake = tmp_path / "photo.onnx"
    png = write_png(str(tmp_path / "photo.png"), 8, 8)
    fake.write_bytes(open(png, "rb").read())
    assert_refused(capfd, check_args(fake, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {fake}: not an ONNX file")


def test_bad_input_model_fails_the_onnx_checker(tmp_path, capfd, calib):
    # A node reads a tensor that nothing produces: the checker's topological-order rule refuses it.
    graph = helper.make_graph(
        [helper.make_node("Relu", ["nowhere"], ["y"])], "broken",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(INPUT_SHAPE))],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, list(INPUT_SHAPE))])
    path = save_model(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]),
                      tmp_path / "broken.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: fails the ONNX checker", "nowhere")


def test_bad_input_model_with_no_inputs(tmp_path, capfd, calib):
    constant = helper.make_node("Constant", [], ["y"],
                                value=numpy_helper.from_array(np.ones((1, CLASSES), np.float32)))
    graph = helper.make_graph([constant], "no_inputs", [],
                              [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, CLASSES])])
    path = save_model(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]),
                      tmp_path / "no_inputs.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: has no inputs")


def test_bad_input_undeclared_dynamic_dimension(tmp_path, capfd, calib):
    path = conv_model(input_dims=("batch", 3, 8, 8), folder=tmp_path, name="dynamic.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: dynamic input dimensions in x [batchx3x8x8]", "--input-shape")


def test_bad_input_shape_override_names_an_unknown_input(tmp_path, capfd, calib):
    path = conv_model(input_dims=("batch", 3, 8, 8), folder=tmp_path, name="dynamic.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out", "--input-shape", "image=1x3x8x8"),
                   tmp_path / "out", f"--input-shape: model {path} has no input 'image' (inputs: x)")


def test_bad_input_shape_override_with_the_wrong_rank(tmp_path, capfd, calib):
    path = conv_model(input_dims=("batch", 3, 8, 8), folder=tmp_path, name="dynamic.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out", "--input-shape", "x=1x3x8"),
                   tmp_path / "out", "--input-shape: input 'x' has rank 4, the override gives 3 dimensions")


def test_bad_input_shape_override_does_not_parse(tmp_path, capfd, calib, model):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--input-shape", "x=1by3"),
                   tmp_path / "out", "--input-shape: cannot read 'x=1by3'")


def test_bad_input_opset_too_old_to_convert(tmp_path, capfd, calib):
    # Opset 5 Relu: the version converter's adapters cannot bring this graph to opset 21.
    graph = helper.make_graph(
        [helper.make_node("Relu", ["x"], ["y"])], "old",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(INPUT_SHAPE))],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, list(INPUT_SHAPE))])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 5)])
    model.ir_version = 3
    path = save_model(model, tmp_path / "old.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: opset 5 is older than 13 and could not be converted",
                   "re-export at opset 13 or newer")


def test_bad_input_model_input_is_not_float(tmp_path, capfd, calib):
    graph = helper.make_graph(
        [helper.make_node("Cast", ["ids"], ["y"], to=TensorProto.FLOAT)], "ints",
        [helper.make_tensor_value_info("ids", TensorProto.INT64, [1, 4])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4])])
    path = save_model(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]),
                      tmp_path / "ints.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: input 'ids' is INT64", "float32-input models")


def test_bad_input_external_data_file_missing(tmp_path, capfd, calib, model):
    loaded = onnx.load(model)
    path = str(tmp_path / "external.onnx")
    onnx.save(loaded, path, save_as_external_data=True, all_tensors_to_one_file=True,
              location="external.weights", size_threshold=0)
    os.remove(tmp_path / "external.weights")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: cannot load its external data")


def test_bad_input_weight_containing_nan(tmp_path, capfd, calib, model):
    loaded = onnx.load(model)
    weight = numpy_helper.to_array(loaded.graph.initializer[0]).copy()
    weight[0, 0, 0, 0] = np.nan
    loaded.graph.initializer[0].CopyFrom(numpy_helper.from_array(weight, "w"))
    path = save_model(loaded, tmp_path / "nan_weight.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: initializer 'w' contains NaN")


def test_bad_input_tensor_whose_bytes_do_not_match_its_shape(tmp_path, capfd, calib, model):
    # The checker does not compare raw_data's length with the dims; the loader must.
    loaded = onnx.load(model)
    loaded.graph.initializer[1].raw_data = b"\0" * 32  # 'b' claims 4 floats = 16 bytes
    path = save_model(loaded, tmp_path / "short_tensor.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: initializer 'b' cannot be read as a tensor")


def test_bad_input_name_that_is_not_utf8(tmp_path, capfd, calib, model):
    loaded = onnx.load(model)
    loaded.graph.node[1].name = "node_name_to_damage"
    data = loaded.SerializeToString()
    # a protobuf string is stored as its length then its bytes: swap two bytes for invalid UTF-8
    assert data.count(b"node_name_to_damage") == 1
    path = tmp_path / "bad_name.onnx"
    path.write_bytes(data.replace(b"node_name_to_damage", b"node_name_\xff_damage\xfe"))
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: a name in node", "is not valid UTF-8 text")


def test_bad_input_batchnorm_with_negative_variance(tmp_path, capfd, calib):
    stats = [numpy_helper.from_array(np.array(v, np.float32), n) for n, v in
             (("gamma", [1, 1, 1]), ("beta", [0, 0, 0]), ("mean", [0, 0, 0]), ("var", [1, -2, 1]))]
    graph = helper.make_graph(
        [helper.make_node("BatchNormalization", ["x", "gamma", "beta", "mean", "var"], ["bn"], name="bn"),
         helper.make_node("GlobalAveragePool", ["bn"], ["pool"]), helper.make_node("Flatten", ["pool"], ["y"])],
        "negative_variance", [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(INPUT_SHAPE))],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 3])], stats)
    path = save_model(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]),
                      tmp_path / "negative_variance.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: BatchNormalization 'bn' has a variance + epsilon that is not positive")


def test_bad_input_shape_override_with_an_absurd_dimension(tmp_path, capfd, calib):
    path = conv_model(input_dims=("batch", 3, 8, 8), folder=tmp_path, name="dynamic.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out", "--input-shape", "x=1x3x8x" + "9" * 5000),
                   tmp_path / "out", "--input-shape:", f"has a dimension larger than {2 ** 31 - 1}")


# ------------------------------------------------------------------------------ data folders

def test_bad_input_missing_calibration_folder(tmp_path, capfd, model):
    assert_refused(capfd, check_args(model, tmp_path / "nope", tmp_path / "out"), tmp_path / "out",
                   f"--calib: {tmp_path / 'nope'}: no such folder")


def test_bad_input_empty_calibration_folder(tmp_path, capfd, model):
    (tmp_path / "empty").mkdir()
    assert_refused(capfd, check_args(model, tmp_path / "empty", tmp_path / "out"), tmp_path / "out",
                   f"calibration data: no image or .npy/.npz files in {tmp_path / 'empty'}")


def test_bad_input_folder_of_only_non_data_files(tmp_path, capfd, model):
    folder = tmp_path / "notes"
    folder.mkdir()
    (folder / "readme.txt").write_text("hello")
    (folder / "values.csv").write_text("1,2,3")
    assert_refused(capfd, check_args(model, folder, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: no image or .npy/.npz files in {folder}", "found 2 other files")


def test_bad_input_mixed_image_sizes_refused_without_a_size(tmp_path, capfd, model):
    folder = tmp_path / "images"
    write_png(str(folder / "a.png"), 8, 8)
    write_png(str(folder / "b.png"), 10, 12, seed=1)
    assert_refused(capfd, check_args(model, folder, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: {folder / 'b.png'}: image is 10x12 (HxW)", "wants 8x8",
                   "set a target size")


def test_bad_input_mixed_image_sizes_resized_when_a_size_is_given(tmp_path, capfd, model):
    folder = tmp_path / "images"
    write_png(str(folder / "a.png"), 8, 8)
    write_png(str(folder / "b.png"), 10, 12, seed=1)
    code, _, stderr, _ = run_qfit(capfd, check_args(model, folder, tmp_path / "out", "--size", "8x8"))
    assert code == 0, stderr
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    assert report["calibration"]["samples"] == 2 and report["calibration"]["skipped"] == 0


def test_bad_input_corrupt_image_named(tmp_path, capfd, model):
    folder = tmp_path / "images"
    write_png(str(folder / "a.png"), 8, 8)
    (folder / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n not really an image")
    assert_refused(capfd, check_args(model, folder, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: {folder / 'broken.png'}: cannot read image", "--skip-bad")


def test_bad_input_corrupt_image_skipped_with_skip_bad_and_counted(tmp_path, capfd, model):
    folder = tmp_path / "images"
    for i in range(3):
        write_png(str(folder / f"ok_{i}.png"), 8, 8, seed=i)
    (folder / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n not really an image")
    code, stdout, stderr, _ = run_qfit(capfd, check_args(model, folder, tmp_path / "out", "--skip-bad"))
    assert code == 0, stderr
    assert "Note: skipped 1 calibration and 1 evaluation files: unreadable (--skip-bad)" in stdout
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    assert report["calibration"]["samples"] == 3
    assert report["calibration"]["skipped"] == 1
    assert report["calibration"]["skipped_files"][0]["file"] == "broken.png"


def test_bad_input_npy_of_the_wrong_shape(tmp_path, capfd, model):
    folder = npy_folder(tmp_path / "calib", count=2)
    np.save(os.path.join(folder, "odd.npy"), np.zeros((1, 3, 8, 9), np.float32))
    assert_refused(capfd, check_args(model, folder, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: {os.path.join(folder, 'odd.npy')}: array has shape (1, 3, 8, 9)",
                   "expected (1, 3, 8, 8) or (3, 8, 8) for input 'x'")


def test_bad_input_npy_of_the_wrong_dtype(tmp_path, capfd, model):
    folder = npy_folder(tmp_path / "calib", count=2)
    np.save(os.path.join(folder, "text.npy"), np.full(INPUT_SHAPE, "a", dtype="<U1"))
    assert_refused(capfd, check_args(model, folder, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: {os.path.join(folder, 'text.npy')}: array has dtype <U1",
                   "expected a numeric dtype")


def test_bad_input_pickled_npy_refused_and_never_unpickled(tmp_path, capfd, model):
    folder = npy_folder(tmp_path / "calib", count=2)
    marker = tmp_path / "unpickled.txt"
    hostile = np.empty(INPUT_SHAPE, dtype=object)
    hostile.flat[0] = _OpensAFileWhenUnpickled(str(marker))
    np.save(os.path.join(folder, "hostile.npy"), hostile, allow_pickle=True)
    assert_refused(capfd, check_args(model, folder, tmp_path / "out", "--skip-bad"), tmp_path / "out",
                   f"calibration data: {os.path.join(folder, 'hostile.npy')}: contains pickled objects; refused")
    assert not marker.exists(), "qfit unpickled the file"


def test_bad_input_pickled_npz_refused_and_never_unpickled(tmp_path, capfd, model):
    folder = npy_folder(tmp_path / "calib", count=2)
    marker = tmp_path / "unpickled.txt"
    hostile = np.empty(INPUT_SHAPE, dtype=object)
    hostile.flat[0] = _OpensAFileWhenUnpickled(str(marker))
    np.savez(os.path.join(folder, "hostile.npz"), x=hostile, allow_pickle=True)
    assert_refused(capfd, check_args(model, folder, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: {os.path.join(folder, 'hostile.npz')}: contains pickled objects; refused")
    assert not marker.exists(), "qfit unpickled the file"


def test_bad_input_raw_pickle_renamed_npy_never_unpickled(tmp_path, capfd, model):
    folder = npy_folder(tmp_path / "calib", count=2)
    marker = tmp_path / "unpickled.txt"
    (tmp_path / "calib" / "hostile.npy").write_bytes(pickle.dumps(_OpensAFileWhenUnpickled(str(marker))))
    assert_refused(capfd, check_args(model, folder, tmp_path / "out", "--skip-bad"), tmp_path / "out",
                   f"calibration data: {os.path.join(folder, 'hostile.npy')}: contains pickled objects; refused")
    assert not marker.exists(), "qfit unpickled the file"


@pytest.mark.parametrize("bad_value, word", [(np.nan, "NaN"), (np.inf, "Inf")])
def test_bad_input_nan_or_inf_in_an_input_file(tmp_path, capfd, model, bad_value, word):
    folder = npy_folder(tmp_path / "calib", count=2)
    values = np.zeros(INPUT_SHAPE, np.float32)
    values[0, 1, 2, 3] = bad_value
    np.save(os.path.join(folder, "bad.npy"), values)
    assert_refused(capfd, check_args(model, folder, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: {os.path.join(folder, 'bad.npy')}: array contains {word}")


def test_bad_input_inf_in_a_calibrated_tensor(tmp_path, capfd, calib):
    # x / 0 is +-Inf (and 0 / 0 NaN) by IEEE 754; the divided tensor 'ratio' is the one to name.
    zeros = numpy_helper.from_array(np.zeros((1, 3, 1, 1), np.float32), "zeros")
    graph = helper.make_graph(
        [helper.make_node("Div", ["x", "zeros"], ["ratio"]),
         helper.make_node("GlobalAveragePool", ["ratio"], ["pool"]),
         helper.make_node("Flatten", ["pool"], ["y"])], "divide_by_zero",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, list(INPUT_SHAPE))],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 3])], [zeros])
    path = save_model(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]),
                      tmp_path / "divide.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   "calibration: tensor 'ratio' took NaN or Inf values on the calibration data")


def test_bad_input_limit_not_positive(tmp_path, capfd, model, calib):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--limit", "0"), tmp_path / "out",
                   "calibration data: limit must be a positive number of samples, got 0")


def test_bad_input_missing_evaluation_folder(tmp_path, capfd, model, calib):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", tmp_path / "nope"),
                   tmp_path / "out", f"evaluation data: {tmp_path / 'nope'}: no such folder")


def test_bad_input_preprocess_file_not_json(tmp_path, capfd, model, calib):
    config = tmp_path / "pre.json"
    config.write_text("{size: 8}")
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--preprocess", config),
                   tmp_path / "out", f"preprocess file {config}: not valid JSON")


# ------------------------------------------------------------------------------ labels CSV

def labelled_eval(tmp_path, rows):
    folder = npy_folder(tmp_path / "eval", count=3)
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("file,label\n" + "".join(f"{f},{label}\n" for f, label in rows))
    return folder, csv_path


def test_bad_input_labels_csv_names_a_missing_file(tmp_path, capfd, model, calib):
    folder, csv_path = labelled_eval(tmp_path, [("sample_000.npy", 0), ("sample_999.npy", 1)])
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", folder, "--labels", csv_path),
                   tmp_path / "out", f"labels CSV {csv_path}: line 3: 'sample_999.npy': no such file in {folder}")


def test_bad_input_labels_csv_names_an_unknown_class(tmp_path, capfd, model, calib):
    # The model has 4 outputs, so class indices run 0..3.
    folder, csv_path = labelled_eval(tmp_path, [("sample_000.npy", 0), ("sample_001.npy", 7)])
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", folder, "--labels", csv_path),
                   tmp_path / "out", f"labels CSV {csv_path}: line 3: unknown class 7 (expected 0..3)")


def test_bad_input_labels_csv_parent_path_refused(tmp_path, capfd, model, calib):
    folder, csv_path = labelled_eval(tmp_path, [("sample_000.npy", 0), ("../calib/sample_001.npy", 1)])
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", folder, "--labels", csv_path),
                   tmp_path / "out",
                   f"labels CSV {csv_path}: line 3: '../calib/sample_001.npy' points outside the data folder; refused")


def test_bad_input_labels_csv_missing(tmp_path, capfd, model, calib):
    folder = npy_folder(tmp_path / "eval", count=2)
    missing = tmp_path / "labels.csv"
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", folder, "--labels", missing),
                   tmp_path / "out", f"labels CSV {missing}: no such file")


# ------------------------------------------------------------------------------ options and output

def test_bad_input_size_string_does_not_parse(tmp_path, capfd, model, calib):
    args = ["check", model, "--calib", calib, "--flash", "1MiB", "--sram", "256QB", "--out", tmp_path / "out"]
    assert_refused(capfd, args, tmp_path / "out", "--sram: cannot read '256QB' as a size")


def test_bad_input_size_with_a_line_break_stays_one_line(tmp_path, capfd, model, calib):
    args = ["check", model, "--calib", calib, "--flash", "1MiB", "--sram", "256\nQB", "--out", tmp_path / "out"]
    assert_refused(capfd, args, tmp_path / "out", "--sram: cannot read '256\\nQB' as a size")


def test_bad_input_size_too_large(tmp_path, capfd, model, calib):
    args = ["check", model, "--calib", calib, "--flash", "99999999999GiB", "--sram", "1MiB", "--out", tmp_path / "out"]
    assert_refused(capfd, args, tmp_path / "out", "--flash: '99999999999GiB' is larger than any memory")


def test_bad_input_unknown_calibration_method(tmp_path, capfd, model, calib):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--method", "median"), tmp_path / "out",
                   "--method: unknown method 'median'")


def test_bad_input_usage_error_missing_required_option(tmp_path, capfd, model, calib):
    args = ["check", model, "--calib", calib, "--sram", "256KiB", "--out", tmp_path / "out"]
    assert_refused(capfd, args, tmp_path / "out", "the following arguments are required: --flash")


def test_bad_input_usage_error_unknown_option(tmp_path, capfd, model, calib):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--colour", "RGB"), tmp_path / "out",
                   "unrecognized arguments: --colour")


def test_bad_input_output_folder_under_a_regular_file(tmp_path, capfd, model, calib):
    # A path whose parent is a file cannot be created, even by root (chmod would not stop root).
    blocker = tmp_path / "blocker"
    blocker.write_text("a file, not a folder")
    out = blocker / "out"
    assert_refused(capfd, check_args(model, calib, out), tmp_path / "blocker",
                   f"--out: cannot create folder {out}", str(blocker))


def test_bad_input_output_folder_is_a_file(tmp_path, capfd, model, calib):
    out = tmp_path / "out.txt"
    out.write_text("keep me")
    assert_refused(capfd, check_args(model, calib, out), out, f"--out: {out} exists and is not a folder")


def test_bad_input_output_would_overwrite_the_input_model(tmp_path, capfd, calib):
    # The int8 model is always <stem>_int8.onnx, so only a report name can land on the input: a model
    # file named report.json with --out set to its own folder.
    folder = tmp_path / "models"
    folder.mkdir()
    path = conv_model(folder=folder, name="report.json")
    assert_refused(capfd, check_args(path, calib, folder), folder,
                   f"--out: writing {folder / 'report.json'} would overwrite the input model {path}")


def test_bad_input_out_folder_not_created_when_a_later_stage_refuses(tmp_path, capfd, calib):
    path = conv_model(input_dims=("batch", 3, 8, 8), folder=tmp_path, name="dynamic.onnx")
    out = tmp_path / "new" / "out"
    assert_refused(capfd, check_args(path, calib, out), tmp_path / "new", "dynamic input dimensions")
    assert not (tmp_path / "new").exists()
