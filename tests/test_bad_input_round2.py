"""Bad input, round two (docs/bad-input.md, "Round two"): outputs that would destroy an input or a
device, counts that could wrap around, options that are not numbers, degenerate and old models, reads
that would never end, denormal weights. In process, through `qfit.cli.main`, with the refusal
contract of tests/test_bad_input.py (exit 2, one stderr line, no traceback, --out untouched).
The cases that need a real process (closed or full stdout, a FIFO) are in
tests/test_bad_input_subprocess.py.
"""
from __future__ import annotations

import json
import os
import stat
from fractions import Fraction

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from qfit.cli import boundary
from qfit import files, sizes
from qfit.quant import scale_floor
# the fixtures (calib, model, the SIGTERM handler kept) and the refusal contract are the first table's
from test_bad_input import (SIZES, _keep_sigterm_handler, assert_refused, calib, check_args,  # noqa: F401
                            conv_model, model, npy_folder, run_qfit)


def file_bytes(path):
    with open(path, "rb") as f:
        return f.read()


# ------------------------------------------------------------------------------ 1. outputs

@pytest.mark.parametrize("flag", ["--json", "--html"])
def test_bad_input_budget_output_is_the_model(tmp_path, capfd, model, flag):
    before = file_bytes(model)
    assert_refused(capfd, ["budget", model, *SIZES, flag, model], tmp_path / "none",
                   f"{flag}: {model} is the input {model}; writing it would destroy the input")
    assert file_bytes(model) == before


def test_bad_input_budget_output_is_a_link_to_a_device(tmp_path, capfd, model):
    # A link to /dev/null stands in for /dev/null itself: if the guard failed, the rename would
    # replace the link in tmp_path, never the device node.
    link = tmp_path / "null.json"
    os.symlink("/dev/null", link)
    assert_refused(capfd, ["budget", model, *SIZES, "--json", link], tmp_path / "none",
                   f"--json: {link} exists and is not a regular file")
    assert os.path.islink(link) and os.readlink(link) == "/dev/null"


def test_bad_input_budget_output_is_a_fifo(tmp_path, capfd, model):
    fifo = tmp_path / "report.html"
    os.mkfifo(fifo)
    assert_refused(capfd, ["budget", model, *SIZES, "--html", fifo], tmp_path / "none",
                   f"--html: {fifo} exists and is not a regular file")
    assert stat.S_ISFIFO(os.lstat(fifo).st_mode)


def test_bad_input_budget_json_and_html_name_one_file(tmp_path, capfd, model):
    same = tmp_path / "both"
    assert_refused(capfd, ["budget", model, *SIZES, "--json", same, "--html", same], tmp_path / "none",
                   f"--json and --html: both name {same}")


def test_bad_input_check_out_inside_the_calibration_folder(tmp_path, capfd, model, calib):
    out = os.path.join(calib, "out")
    assert_refused(capfd, check_args(model, calib, out), calib, f"--out: {out} is inside the input folder {calib}")


def test_bad_input_check_out_would_replace_the_preprocess_file(tmp_path, capfd, model, calib):
    out = tmp_path / "out"
    out.mkdir()
    pre = out / "report.json"
    pre.write_text("{}")
    assert_refused(capfd, check_args(model, calib, out, "--preprocess", pre), out,
                   f"would overwrite the input file {pre} (--preprocess)")


def test_bad_input_every_output_gets_the_same_mode(tmp_path, capfd, model, calib):
    """report.json of `qfit budget --json` used to keep mkstemp's 0600; every output now gets the
    mode any new file gets under the umask (0644 under umask 022)."""
    old = os.umask(0o022)
    try:
        code, _, err, _ = run_qfit(capfd, ["budget", model, *SIZES, "--json", tmp_path / "b.json",
                                           "--html", tmp_path / "b.html"])
        assert code == 0, err
        code, _, err, _ = run_qfit(capfd, check_args(model, calib, tmp_path / "out"))
        assert code in (0, 1), err
    finally:
        os.umask(old)
    written = [tmp_path / "b.json", tmp_path / "b.html", *sorted((tmp_path / "out").iterdir())]
    assert len(written) == 6
    assert {stat.S_IMODE(os.stat(p).st_mode) for p in written} == {0o644}


# ------------------------------------------------------------------------------ 2. counts

def test_bad_input_element_counts_are_exact_integers():
    # exact arithmetic: Python integers against numpy's int64 product, which wraps around
    shape = (1, 4, 2 ** 31 - 1, 2 ** 31 - 1)
    exact = 4 * (2 ** 31 - 1) ** 2
    assert sizes.element_count(shape) == exact
    assert exact > 2 ** 63  # beyond int64: numpy's product would have wrapped around
    with pytest.raises(Exception, match="over qfit's ceiling of 4294967296"):
        sizes.check_tensor_elements(shape, "t")


def test_bad_input_dims_whose_product_wraps_int64_refused(tmp_path, capfd):
    """Each dimension passes the per-dimension limit, their product does not fit int64: this gave a
    negative peak and "Verdict: fits"."""
    path = conv_model(input_dims=[1, 3, "H", "W"], folder=tmp_path, name="dyn.onnx")
    assert_refused(capfd, ["budget", path, *SIZES, "--input-shape", "x=1x3x2147483647x2147483647"],
                   tmp_path / "none", f"model: {path}: tensor", "over qfit's ceiling of 4294967296 (2**32) per tensor")


# ------------------------------------------------------------------------------ 3. options and models

@pytest.mark.parametrize("value", ["150", "-5", "0", "nan"])
def test_bad_input_percentile_outside_0_100(tmp_path, capfd, model, calib, value):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--percentile", value), tmp_path / "out",
                   "--percentile: must be")


@pytest.mark.parametrize("args, fragment", [
    (["--seed", "-1"], "--seed: must be 0 or a positive whole number, got -1"),
    (["--threads", "100000"], "--threads: must be between 0 (onnxruntime's default) and 256, got 100000"),
    (["--max-drop", "inf"], "--max-drop: must be a finite number, got inf"),
    (["--threshold", "nan"], "--threshold: must be a finite number, got nan"),
])
def test_bad_input_check_numeric_option(tmp_path, capfd, model, calib, args, fragment):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", *args), tmp_path / "out", fragment)


def test_bad_input_no_command_is_one_line(tmp_path, capfd):
    assert_refused(capfd, [], tmp_path / "none", "no command given: choose one of check, budget, export")


@pytest.mark.parametrize("value", ["-1", "1e9", "nan"])
def test_bad_input_order_time_limit_outside_its_range(tmp_path, capfd, model, value):
    assert_refused(capfd, ["budget", model, *SIZES, "--order-time-limit", value], tmp_path / "none",
                   "--order-time-limit: must be")


@pytest.mark.parametrize("field, value, fragment", [
    ("percentile", 150.0, "--percentile: must be in (0, 100], got 150.0"),
    ("percentile", float("nan"), "--percentile: must be in (0, 100], got nan"),
    ("seed", -3, "--seed: must be 0 or a positive whole number, got -3")])
def test_bad_input_library_refuses_what_the_cli_refuses(tmp_path, model, calib, field, value, fragment):
    """The library keeps its own guard: a caller of qfit.check.check gets the same one-line QfitError."""
    from qfit import check as check_module
    from qfit.errors import QfitError
    options = check_module.CheckOptions(model_path=model, calib_dir=calib, out_dir=str(tmp_path / "out"),
                                        flash_limit_bytes=1 << 20, sram_limit_bytes=1 << 18, **{field: value})
    with pytest.raises(QfitError) as refused:
        check_module.check(options)
    assert fragment in str(refused.value)
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("args, fragment", [
    (["--cycles-per-mac", "nan", "--clock-mhz", "100"], "--cycles-per-mac: must be a finite number, got nan"),
    (["--cycles-per-mac", "1", "--clock-mhz", "inf"], "--clock-mhz: must be a finite number, got inf"),
    (["--energy-per-mac-pj", "inf"], "--energy-per-mac-pj: must be a finite number, got inf"),
    (["--energy-per-mac-pj", "-1"], "--energy-per-mac-pj: must be more than 0, got -1.0"),
])
def test_bad_input_budget_numeric_option(tmp_path, capfd, model, args, fragment):
    assert_refused(capfd, ["budget", model, *SIZES, "--json", tmp_path / "b.json", *args], tmp_path / "b.json",
                   fragment)


def test_bad_input_zero_sram_names_the_option_not_a_field(tmp_path, capfd, model):
    message = assert_refused(capfd, ["budget", model, "--flash", "1MiB", "--sram", "0"], tmp_path / "none",
                             "--sram: must be more than 0 bytes, got '0'")
    assert "_bytes" not in message


def test_bad_input_library_budget_messages_name_no_field():
    from qfit.errors import QfitError
    from qfit.memory.options import BudgetOptions
    for fields in ({"sram_limit_bytes": 0}, {"flash_limit_bytes": -1}, {"clock_mhz": float("nan")}):
        with pytest.raises(QfitError) as caught:
            BudgetOptions(**fields).validate()
        assert not any(name in str(caught.value) for name in fields), caught.value


def test_bad_input_report_refuses_nan_before_json():
    from qfit.errors import QfitError
    with pytest.raises(QfitError, match=r"report\.accuracy\.drop_pt: the figure is nan"):
        files.json_bytes({"accuracy": {"drop_pt": float("nan")}})


def test_bad_input_messages_are_capped_and_hold_no_address():
    text = "model: m.onnx: <onnx.Foo object at 0x7f3a2b1c9d80> " + "n," * 10000
    shown = boundary.user_message(text)
    assert "0x7f3a2b1c9d80" not in shown
    assert len(shown) <= boundary.MAX_MESSAGE_CHARS


def test_bad_input_long_value_gives_a_capped_line(tmp_path, capfd, model, calib):
    message = assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--input-shape", "x" * 20000),
                             tmp_path / "out", "--input-shape: cannot read")
    assert len(message) <= len("qfit: error: ") + boundary.MAX_MESSAGE_CHARS


@pytest.mark.parametrize("scale", [1e-45, 1e-38])
def test_bad_input_tiny_pixel_scale_does_not_break_the_histogram(tmp_path, capfd, model, scale):
    """Pixels times 1e-45 are denormal float32: the range histogram's bins per unit overflowed and
    binning failed. Now the run ends with a verdict (its accuracy gate judges the result)."""
    from test_bad_input import write_png
    images = tmp_path / "images"
    for i in range(4):
        write_png(str(images / f"part_{i}.png"), 8, 8, seed=i)
    pre = tmp_path / "pre.json"
    pre.write_text(json.dumps({"scale": scale}))
    code, _, err, _ = run_qfit(capfd, check_args(model, images, tmp_path / "out", "--preprocess", pre))
    assert code in (0, 1), err
    assert "Traceback" not in err
    assert json.loads((tmp_path / "out" / "report.json").read_text())["verdict"]["exit_code"] == code


def test_histogram_of_denormal_values_counts_every_value():
    from qfit.quant.observe import TensorStats
    stats = TensorStats("t")
    values = np.array([1e-41, -3e-42, 0.0, 2e-45], np.float32)
    stats.update(values)
    assert stats.count == 4 and int(stats.hist.sum()) == 4  # every value binned, none lost or negative
    assert stats.radius >= scale_floor.MIN_HISTOGRAM_RADIUS


def test_bad_input_calibration_values_near_1e18_give_a_line_not_nan_json(tmp_path, capfd, model):
    """Values near 1e18 square past float32 in the error sums: a NaN figure is refused before any
    JSON is written (allow_nan=False never has to raise)."""
    folder = tmp_path / "huge"
    folder.mkdir()
    rng = np.random.default_rng(0)
    for i in range(4):
        np.save(folder / f"s{i}.npy", (rng.standard_normal((1, 3, 8, 8)) * 1e18).astype(np.float32))
    out = tmp_path / "out"
    code, stdout, err, _ = run_qfit(capfd, check_args(model, folder, out))
    assert "Traceback" not in err
    if code == 2:
        assert err.count("\n") <= 1 and "not a finite number" in err and not out.exists()
    else:  # a run that keeps every figure finite is fine too: then its JSON parses strictly
        json.loads((out / "report.json").read_text(), parse_constant=lambda c: pytest.fail(c))


def _save(model, path):
    onnx.save(model, str(path))
    return str(path)


def test_bad_input_model_with_zero_outputs(tmp_path, capfd, calib):
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, 8, 8])
    graph = helper.make_graph([helper.make_node("Relu", ["x"], ["y"])], "g", [x], [])
    path = _save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), tmp_path / "zero.onnx")
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: has no outputs")


def test_bad_input_identity_only_model(tmp_path, capfd, calib):
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, 8, 8])
    y = helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 3, 8, 8])
    graph = helper.make_graph([helper.make_node("Identity", ["x"], ["y"])], "g", [x], [y])
    path = _save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), tmp_path / "identity.onnx")
    for args in (check_args(path, calib, tmp_path / "out"), ["budget", path, *SIZES]):
        assert_refused(capfd, args, tmp_path / "out", f"model: {path}: has only pass-through operators (Identity)")


def test_identity_from_an_input_to_an_output_is_kept_without_a_loop():
    """Next to real work, an input copied straight to an output keeps its Identity (renaming it
    away made the Identity read its own output)."""
    from qfit.graph import rewrite
    x = helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 4])
    graph = helper.make_graph([helper.make_node("Identity", ["x"], ["copy"]), helper.make_node("Relu", ["x"], ["y"])],
                              "g", [x], [helper.make_tensor_value_info("copy", TensorProto.FLOAT, [1, 4]),
                                         helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4])])
    rewrite.drop_passthrough(graph)
    assert [(n.op_type, list(n.input), list(n.output)) for n in graph.node] == [
        ("Identity", ["x"], ["copy"]), ("Relu", ["x"], ["y"])]


def test_bad_input_opset_newer_than_onnxruntime_runs(tmp_path, capfd, calib):
    path = conv_model(folder=tmp_path, name="future.onnx")
    future = onnx.load(path)
    future.opset_import[0].version = 40
    _save(future, path)
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"model: {path}: opset 40 is newer than onnxruntime", "re-export at opset")


def test_bad_input_opset7_ir3_model_with_initializers_outside_the_inputs_accepted(tmp_path, capfd, calib):
    path = conv_model(folder=tmp_path, name="old.onnx", opset=7)
    old = onnx.load(path)
    old.ir_version = 3
    _save(old, path)
    with pytest.raises(onnx.checker.ValidationError, match="not in graph input"):
        onnx.checker.check_model(old)  # the file as such fails the checker
    code, _, err, _ = run_qfit(capfd, check_args(path, calib, tmp_path / "out"))
    assert code == 0, err
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    assert "opset converted from 7 to 21" in report["model"]["notes"]


def test_bad_input_class_folder_name_not_utf8(tmp_path, capfd, model, calib):
    """A class folder whose name is not UTF-8 reaches Python as surrogate escapes; the reports
    spell the byte as \\xff instead of failing to encode."""
    root = os.fsencode(str(tmp_path / "eval"))
    for name in (b"bolt", b"nut\xff", b"pin", b"washer"):
        npy_folder(os.fsdecode(os.path.join(root, name)), count=2, seed=len(name))
    out = tmp_path / "out"
    code, stdout, err, _ = run_qfit(capfd, check_args(model, calib, out, "--eval", os.fsdecode(root)))
    assert code in (0, 1), err
    assert "Traceback" not in err
    report = json.loads((out / "report.json").read_text(encoding="utf-8"))
    assert "nut\\xff" in report["evaluation"]["class_names"]
    (out / "report.md").read_text(encoding="utf-8")  # valid UTF-8 throughout
    (out / "report.html").read_text(encoding="utf-8")


def test_bad_input_report_md_escapes_html_in_node_names(tmp_path, capfd, calib):
    path = conv_model(folder=tmp_path, name="named.onnx")
    named = onnx.load(path)
    named.graph.node[0].name = "<script>alert(1)</script>"
    _save(named, path)
    code, _, err, _ = run_qfit(capfd, check_args(path, calib, tmp_path / "out"))
    assert code in (0, 1), err
    text = (tmp_path / "out" / "report.md").read_text()
    assert "<script>" not in text
    assert "&lt;script&gt;" in text


# ------------------------------------------------------------------------------ 4. reads

@pytest.mark.parametrize("flag", ["--labels", "--preprocess"])
def test_bad_input_endless_stream_as_a_small_input_file(tmp_path, capfd, model, calib, flag):
    extra = [flag, "/dev/zero"] + (["--eval", calib] if flag == "--labels" else [])
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", *extra), tmp_path / "out",
                   "/dev/zero: not a regular file")


def test_bad_input_oversized_labels_file_refused_after_the_cap(tmp_path, capfd, model, calib):
    big = tmp_path / "labels.csv"
    with open(big, "wb") as f:
        f.truncate(files.MAX_SMALL_FILE_BYTES + 1)  # sparse: no disk used
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", calib, "--labels", big),
                   tmp_path / "out", f"labels CSV {big}: larger than 64 MiB")


# ------------------------------------------------------------------------------ 5. denormal weights

def test_bad_input_denormal_weight_channel_gets_the_minimum_scale(tmp_path, capfd, calib):
    path = conv_model(folder=tmp_path, name="denormal.onnx")
    m = onnx.load(path)
    w = numpy_helper.to_array(m.graph.initializer[0]).copy()
    w[1] = np.float32(1e-41)  # a denormal float32
    b = np.array([0.1, 0.2, -0.1, 0.05], np.float32)
    m.graph.initializer[0].CopyFrom(numpy_helper.from_array(w, "w"))
    m.graph.initializer[1].CopyFrom(numpy_helper.from_array(b, "b"))
    _save(m, path)
    code, _, err, _ = run_qfit(capfd, check_args(path, calib, tmp_path / "out"))
    assert code in (0, 1), err
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    assert any("denormal weight values in w" in note for note in report["model"]["notes"])
    q = onnx.load(str(tmp_path / "out" / "denormal_int8.onnx"))
    inits = {i.name: numpy_helper.to_array(i) for i in q.graph.initializer}
    dq = {n.input[0]: n.input[1] for n in q.graph.node if n.op_type == "DequantizeLinear"}
    w_scale = inits[dq[next(k for k in dq if k.startswith("w_"))]]
    b_scale = inits[dq[next(k for k in dq if k.startswith("b_"))]]
    tiny = np.finfo(np.float32).tiny
    assert np.all(w_scale >= scale_floor.MIN_WEIGHT_SCALE) and np.all(w_scale >= tiny)
    assert np.all(b_scale >= tiny), b_scale  # positive normal float32: no runtime flushes it to 0
    # bias scale = input scale x weight scale, exactly as a float32 product (ONNX QLinearConv
    # convention, common practice): find the input scale that makes every channel agree
    conv = next(n for n in q.graph.node if n.op_type == "Conv")
    x_dq = next(n for n in q.graph.node if n.op_type == "DequantizeLinear" and n.output[0] == conv.input[0])
    s_in = np.float32(inits[x_dq.input[1]])
    assert [Fraction(float(v)) for v in b_scale] == [Fraction(float(np.float32(s_in * s))) for s in w_scale]


# ------------------------------------------------------------------------------ 7. labels, batches

def test_bad_input_labels_without_eval_reach_the_repair_search(tmp_path, capfd, model, monkeypatch):
    """--labels with no --eval labels the calibration folder, which then is the evaluation data of
    every pass: the accuracy, the sensitivity sweep and the repair search (it used to ignore them)."""
    from qfit.search import repair
    calib = npy_folder(tmp_path / "calib", count=12)
    labels = tmp_path / "labels.csv"
    labels.write_text("file,label\n" + "".join(f"sample_{i:03d}.npy,{i % 4}\n" for i in range(12)))
    seen = []
    real_init = repair.DropMeter.__init__

    def recording_init(self, *args, **kwargs):
        real_init(self, *args, **kwargs)
        seen.append(self.labelled)

    monkeypatch.setattr(repair.DropMeter, "__init__", recording_init)
    # a negative target asks int8 to beat float: the drop is above it, so the search runs
    code, _, err, _ = run_qfit(capfd, check_args(model, calib, tmp_path / "out", "--labels", labels,
                                                 "--max-drop", "-100"))
    assert code == 1, err
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    assert report["accuracy"]["metric"] == "top1" and report["evaluation"]["labels"] == "csv"
    assert "search" in report["repair"]
    assert seen and all(seen), seen


def test_bad_input_batch_above_one_through_the_sensitivity_sweep(tmp_path, capfd):
    """A dynamic batch fixed at 4 with --input-shape: the data passes and the one-layer-at-a-time
    sweep run batches of 4 (the sweep used to assume batch 1)."""
    path = conv_model(input_dims=["N", 3, 8, 8], folder=tmp_path, name="batched.onnx")
    batched = onnx.load(path)
    batched.graph.output[0].type.tensor_type.shape.dim[0].dim_param = "N"
    _save(batched, path)
    calib = npy_folder(tmp_path / "calib", shape=(3, 8, 8), count=8)
    for k in range(4):
        npy_folder(tmp_path / "eval" / f"class_{k}", shape=(3, 8, 8), count=3, seed=k + 1)
    code, _, err, _ = run_qfit(capfd, check_args(path, calib, tmp_path / "out", "--input-shape", "x=4x3x8x8",
                                                 "--eval", tmp_path / "eval"))
    assert code in (0, 1), err
    assert "Traceback" not in err
    report = json.loads((tmp_path / "out" / "report.json").read_text())
    assert report["model"]["inputs"]["x"] == [4, 3, 8, 8]
    assert report["sensitivity"]["samples_used"] > 0


def test_bad_input_missing_model_with_a_non_utf8_name_is_one_readable_line(tmp_path, capfd, calib):
    missing = os.fsdecode(os.path.join(os.fsencode(str(tmp_path)), b"gone\xff.onnx"))
    message = assert_refused(capfd, check_args(missing, calib, tmp_path / "out"), tmp_path / "out",
                             "no such file")
    assert "gone\\xff.onnx" in message


@pytest.mark.parametrize("flag, what", [("--labels", "labels CSV"), ("--preprocess", "preprocess file")])
def test_bad_input_small_input_file_is_a_folder(tmp_path, capfd, model, calib, flag, what):
    extra = [flag, calib] + (["--eval", calib] if flag == "--labels" else [])
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", *extra), tmp_path / "out",
                   f"{what} {calib}: is a directory, not a file")


@pytest.mark.parametrize("required_bytes", [0, -(2 ** 63)])
def test_bad_input_a_peak_of_zero_or_less_never_fits(tmp_path, required_bytes):
    """A wrapped-around count used to read as "fits" under any limit; whatever produced it, a peak
    that is not positive is now "does not fit"."""
    from qfit.graph.load import load_model
    from qfit.memory import sram
    from qfit.memory.options import BudgetOptions
    from qfit.quant.plan import make_plan
    loaded = load_model(conv_model(folder=tmp_path))
    options = BudgetOptions(flash_limit_bytes=1 << 20, sram_limit_bytes=1 << 18)
    memory = sram.build_memory_model(loaded, make_plan(loaded), options)
    _, live, _ = sram.sram_for(memory, options)
    assert sram.sram_section(memory, live, options, live.peak_bytes)["fits"] is True  # the real peak fits
    assert sram.sram_section(memory, live, options, required_bytes)["fits"] is False


# ------------------------------------------------------------------------------ 4. round three: gates, class
# order, preprocessing, export, commands (docs/bad-input.md, "Round three"). Every message was taken
# from a real run of the CLI; each row of the doc's round-three tables is one case here.

def class_folders(folder, names):
    for k, name in enumerate(names):
        npy_folder(os.path.join(folder, name), count=2, seed=k + 1)
    return str(folder)


def csv_eval(tmp_path, text):
    """A flat evaluation folder s0.npy..s3.npy and a labels CSV holding `text`."""
    folder = npy_folder(tmp_path / "ev")
    for i in range(4):
        os.rename(os.path.join(folder, f"sample_{i:03d}.npy"), os.path.join(folder, f"s{i}.npy"))
    labels = tmp_path / "labels.csv"
    labels.write_text(text)
    return ["--eval", folder, "--labels", labels]


@pytest.mark.parametrize("args, fragment", [
    (["--expect-float", "150"], "--expect-float: must be a top-1 accuracy in percent (0 to 100), got 150.0"),
    (["--expect-float", "-1"], "--expect-float: must be a top-1 accuracy in percent (0 to 100), got -1.0"),
    (["--expect-float-tolerance", "-1"], "--expect-float-tolerance: must be a number of points >= 0, got -1.0"),
    (["--expect-float-tolerance", "nan"], "--expect-float-tolerance: must be a finite number, got nan"),
    (["--expect-float", "90"], "--expect-float: needs labelled evaluation data (class subfolders or --labels); "
                               "this run has no labels to measure the float top-1 on"),
])
def test_bad_input_gate_option(tmp_path, capfd, model, calib, args, fragment):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", *args), tmp_path / "out", fragment)


def test_bad_input_expect_float_with_an_unlabelled_eval_folder(tmp_path, capfd, model, calib):
    flat = npy_folder(tmp_path / "flat")
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--expect-float", "90", "--eval", flat),
                   tmp_path / "out", "--expect-float: needs labelled evaluation data")


@pytest.mark.parametrize("order, fragment", [
    ("justone", "--class-order: 'justone' is neither a file nor a comma-separated list of class names"),
    ("a,,b,c", "--class-order: an empty class name (position 2)"),
    ("a,a,b,c", "--class-order: class 'a' is listed twice"),
    ("a,b,c", "--class-order: names 3 classes but the model has 4 outputs"),
])
def test_bad_input_class_order_list(tmp_path, capfd, model, calib, order, fragment):
    evaluation = class_folders(tmp_path / "eval", ["c0", "c1", "c2", "c3"])
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", evaluation, "--class-order", order),
                   tmp_path / "out", fragment)


def test_bad_input_class_order_file_not_utf8(tmp_path, capfd, model, calib):
    evaluation = class_folders(tmp_path / "eval", ["c0", "c1", "c2", "c3"])
    order = tmp_path / "order.txt"
    order.write_bytes(b"a\nb\xff\nc\nd\n")
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", evaluation, "--class-order", order),
                   tmp_path / "out", f"--class-order: {order}: not UTF-8 text (bad byte at offset 3)")


def test_bad_input_subfolder_not_in_the_class_order(tmp_path, capfd, model, calib):
    evaluation = class_folders(tmp_path / "eval", ["c0", "c1", "c2", "c3"])
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", evaluation,
                                     "--class-order", "c0,c1,c2,zz"), tmp_path / "out",
                   f"evaluation data: subfolder 'c3' of {evaluation} is not in the class order (c0, c1, c2, zz)")


def test_bad_input_more_class_subfolders_than_classes(tmp_path, capfd, model, calib):
    evaluation = class_folders(tmp_path / "eval", ["c0", "c1", "c2", "c3", "c4"])
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", evaluation), tmp_path / "out",
                   f"evaluation data: {evaluation} has 5 class subfolders but the model has 4 classes")


@pytest.mark.parametrize("text, extra, fragment", [
    ("file,label\ns0.npy,cat\ns1.npy,dog\n", [],
     "labels CSV {csv}: labels are class names (e.g. 'cat') but the order of the model's outputs is not known; "
     "give it with --class-order (names separated by commas, or a file with one name per line)"),
    ("file,label\ns0.npy,cat\ns1.npy,dog\n", ["--class-order", "cat,bird,fish,cow"],
     "labels CSV {csv}: line 3: unknown class 'dog' (classes: cat, bird, fish, cow)"),
    ("s0.npy,1\ns1.npy,2\ns0.npy,3\n", [], "labels CSV {csv}: line 3: 's0.npy' is listed again (first on line 1)"),
    ("s0.npy,1,2\n", [], "labels CSV {csv}: line 1: expected 2 fields `file,label`, found 3"),
    ("s0.npy,\n", [], "labels CSV {csv}: line 1: empty label"),
    ("file,label\n", [], "labels CSV {csv}: no `file,label` rows"),
    # a first row whose file is not a data file is read as a header, so a lone bad row leaves no rows
    ("/etc/passwd,1\n", [], "labels CSV {csv}: no `file,label` rows"),
    ("s0.npy," + "9" * 30 + "\n", [], "labels CSV {csv}: line 1: class index " + "9" * 30 + " is too large"),
    ("s0.npy,-1\n", [], "labels CSV {csv}: line 1: unknown class -1 (expected 0..3)"),
])
def test_bad_input_labels_csv_round_three(tmp_path, capfd, model, calib, text, extra, fragment):
    args = csv_eval(tmp_path, text)
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", *args, *extra), tmp_path / "out",
                   fragment.format(csv=tmp_path / "labels.csv"))


@pytest.mark.parametrize("args", [["--size", "8x8"], ["--mean", "0.5"]])
def test_bad_input_preprocessing_options_with_an_array_folder(tmp_path, capfd, model, calib, args):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", *args), tmp_path / "out",
                   f"calibration data: {calib} holds .npy/.npz arrays, which are fed to the model as they are; "
                   "preprocessing options (--preprocess, --size, --color, --layout, --scale, --mean, --std) apply "
                   "to images only: drop them or preprocess the arrays")


@pytest.mark.parametrize("args, fragment", [
    (["--size", "8by8"], "--size: cannot read '8by8' (expected HxW, e.g. 96x96)"),
    (["--mean", "a,b"], "--mean: cannot read 'a,b' as comma-separated numbers"),
    (["--size", "9x9"], "preprocess: size 9x9 (HxW) does not match model input 'x' (1, 3, 8, 8), which wants 8x8"),
    (["--mean", "0.1,0.2"], "preprocess: mean has 2 values; expected 1 or 3 (one per channel for color RGB)"),
    (["--mean", "nan"], "preprocess: key 'mean': expected a number or a non-empty list of numbers, got [NaN]"),
    (["--color", "L"], "calibration data: model input 'x' (1, 3, 8, 8) has 3 channels in layout NCHW, color L "
                       "gives 1; the model wants color RGB or BGR"),
])
def test_bad_input_image_preprocessing_option(tmp_path, capfd, model, args, fragment):
    from test_bad_input import write_png
    images = tmp_path / "images"
    write_png(str(images / "a.png"), 8, 8)
    assert_refused(capfd, check_args(model, images, tmp_path / "out", *args), tmp_path / "out", fragment)


@pytest.mark.parametrize("content, fragment", [
    ("[1, 2]", "preprocess file {pre}: expected a JSON object with keys like \"size\", \"mean\", \"std\""),
    ('{"colour": "RGB"}', "preprocess file {pre}: unknown key 'colour' (known keys: size, resize, color, layout, "
                          "scale, mean, std)"),
    ('{"scale": "big"}', "preprocess file {pre}: key 'scale': expected a positive number, got \"big\""),
    ('{"std": [0, 1, 1]}', "preprocess file {pre}: key 'std': every std value must be positive (it divides), "
                           "got [0, 1, 1]"),
])
def test_bad_input_preprocess_file_content(tmp_path, capfd, model, content, fragment):
    from test_bad_input import write_png
    images = tmp_path / "images"
    write_png(str(images / "a.png"), 8, 8)
    pre = tmp_path / "pre.json"
    pre.write_text(content)
    assert_refused(capfd, check_args(model, images, tmp_path / "out", "--preprocess", pre), tmp_path / "out",
                   fragment.format(pre=pre))


def test_bad_input_folder_mixing_images_and_arrays(tmp_path, capfd, model):
    from test_bad_input import write_png
    images = tmp_path / "images"
    write_png(str(images / "a.png"), 8, 8)
    np.save(images / "c.npy", np.zeros((1, 3, 8, 8), np.float32))
    assert_refused(capfd, check_args(model, images, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: {images} mixes images and arrays (e.g. a.png and c.npy); use one kind per folder")


def test_bad_input_npz_without_the_input_key(tmp_path, capfd, model):
    folder = tmp_path / "npz"
    folder.mkdir()
    np.savez(folder / "a.npz", y=np.zeros((1, 3, 8, 8), np.float32), z=np.zeros((1, 3, 8, 8), np.float32))
    assert_refused(capfd, check_args(model, folder, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: {folder}/a.npz: no key for input(s) x; keys y, z are not model inputs "
                   "(model inputs: x)")


def test_bad_input_every_file_bad_with_skip_bad(tmp_path, capfd, model):
    folder = tmp_path / "allbad"
    folder.mkdir()
    (folder / "a.png").write_bytes(b"no")
    assert_refused(capfd, check_args(model, folder, tmp_path / "out", "--skip-bad"), tmp_path / "out",
                   f"calibration data: no readable files in {folder} (1 skipped as bad, first: a.png: cannot read image")


@pytest.mark.parametrize("flag, what", [("--calib", "calibration data"), ("--eval", "evaluation data")])
def test_bad_input_data_folder_is_a_file(tmp_path, capfd, model, calib, flag, what):
    a_file = tmp_path / "afile"
    a_file.write_text("x")
    args = check_args(model, a_file, tmp_path / "out") if flag == "--calib" else \
        check_args(model, calib, tmp_path / "out", "--eval", a_file)
    assert_refused(capfd, args, tmp_path / "out", f"{what}: {a_file}: not a folder")


@pytest.mark.parametrize("args, fragment", [
    (["--arithmetic", "fixed"], "qfit check: argument --arithmetic: invalid choice: 'fixed' "
                                "(choose from 'integer', 'float')"),
    (["--rounding", "triple"], "qfit check: argument --rounding: invalid choice: 'triple' "
                               "(choose from 'double', 'single')"),
    (["--isolated-samples", "-1"], "--isolated-samples: must be 0 (skip the sweep) or a positive number, got -1"),
    (["--repair-layers", "0"], "--repair-layers: must be a positive number, got 0"),
    (["--repair-steps", "0"], "--repair-steps: must be a positive number, got 0"),
    (["--repair-samples", "0"], "--repair-samples: must be a positive number, got 0"),
    (["--batch", "0"], "--batch: must be more than 0 and at most 65536, got 0"),
    (["--batch", "100000000"], "--batch: must be more than 0 and at most 65536, got 100000000"),
    (["--limit", "-3"], "calibration data: limit must be a positive number of samples, got -3"),
    (["--input-shape", "x=0x3x8x8"], "--input-shape: 'x=0x3x8x8' has a dimension that is not positive"),
    (["--input-shape", "x=2x3x8x8"], "--input-shape: input 'x' dimension 0 is fixed at 1 in the model, "
                                     "the override gives 2"),
    (["--method", ""], "--method: unknown method '' (choose from minmax, percentile, mse, entropy)"),
])
def test_bad_input_check_option_round_three(tmp_path, capfd, model, calib, args, fragment):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", *args), tmp_path / "out", fragment)


def test_bad_input_eval_limit_not_positive(tmp_path, capfd, model, calib):
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", calib, "--eval-limit", "0"),
                   tmp_path / "out", "evaluation data: limit must be a positive number of samples, got 0")


def test_bad_input_library_refuses_an_unknown_arithmetic_or_rounding():
    """Through the library the same check names the option (argparse refuses first on the command line)."""
    from qfit.errors import QfitError
    from qfit.measure import integer
    with pytest.raises(QfitError, match=r"^--arithmetic: unknown arithmetic 'fixed' \(choose from integer, float\)$"):
        integer.check_arithmetic_options("fixed", "double")
    with pytest.raises(QfitError, match=r"^--rounding: unknown rounding 'triple' \(choose from double, single\)$"):
        integer.check_arithmetic_options("integer", "triple")


PREFIX_MESSAGE = "is not a C identifier of letters, digits and single underscores, starting with a letter, at most 24 characters"


@pytest.mark.parametrize("args, fragment", [
    (["--prefix", "1bad"], f"--prefix: '1bad' {PREFIX_MESSAGE}"),
    (["--prefix", "a__b"], f"--prefix: 'a__b' {PREFIX_MESSAGE}"),
    (["--prefix", "a" * 25], f"--prefix: '{'a' * 25}' {PREFIX_MESSAGE}"),
    (["--export-alignment", "0"], "--export-alignment: must be a power of two from 1 to 4096, got 0"),
    (["--export-alignment", "3"], "--export-alignment: must be a power of two from 1 to 4096, got 3"),
    (["--export-alignment", "8192"], "--export-alignment: must be a power of two from 1 to 4096, got 8192"),
    (["--alignment", "3"], "--alignment: must be a power of two, got 3"),
])
def test_bad_input_export_option(tmp_path, capfd, model, args, fragment):
    assert_refused(capfd, ["export", model, "--out", tmp_path / "exp", *args], tmp_path / "exp", fragment)


@pytest.mark.parametrize("args, fragment", [
    (["--prefix", "1bad"], f"--prefix: '1bad' {PREFIX_MESSAGE}"),
    (["--export-alignment", "3"], "--export-alignment: must be a power of two from 1 to 4096, got 3"),
])
def test_bad_input_check_export_option(tmp_path, capfd, model, calib, args, fragment):
    out = tmp_path / "out"
    assert_refused(capfd, check_args(model, calib, out, "--export", tmp_path / "exp", *args), tmp_path / "exp",
                   fragment)
    assert not out.exists()


def test_bad_input_check_export_folder_is_a_file(tmp_path, capfd, model, calib):
    a_file = tmp_path / "afile"
    a_file.write_text("x")
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--export", a_file), tmp_path / "out",
                   f"--export: {a_file} exists and is not a folder")
    assert a_file.read_text() == "x"


def test_bad_input_export_of_a_float_model(tmp_path, capfd, model):
    assert_refused(capfd, ["export", model, "--out", tmp_path / "exp"], tmp_path / "exp",
                   f"export: {model}: not a QDQ model (no QuantizeLinear/DequantizeLinear); "
                   "quantize it first with qfit check")


def test_bad_input_export_out_is_a_file(tmp_path, capfd, model):
    a_file = tmp_path / "afile"
    a_file.write_text("x")
    assert_refused(capfd, ["export", model, "--out", a_file], a_file, f"--out: {a_file} exists and is not a folder")


def test_bad_input_export_missing_model(tmp_path, capfd):
    assert_refused(capfd, ["export", tmp_path / "nope.onnx", "--out", tmp_path / "exp"], tmp_path / "exp",
                   f"model: {tmp_path / 'nope.onnx'}: no such file")


def test_bad_input_export_would_overwrite_its_input(tmp_path, capfd, model, calib):
    code, _, err, _ = run_qfit(capfd, check_args(model, calib, tmp_path / "q", "--no-accuracy-gate"))
    assert code == 0, err
    folder = tmp_path / "m"
    folder.mkdir()
    int8 = folder / "qmodel.json"  # the int8 model under the name the manifest would take
    int8.write_bytes(file_bytes(tmp_path / "q" / "net_int8.onnx"))
    before = file_bytes(int8)
    assert_refused(capfd, ["export", int8, "--out", folder], folder,
                   f"--out: writing {int8} would overwrite the input model {int8}")
    assert file_bytes(int8) == before


def test_bad_input_check_export_of_an_operator_the_export_lacks(tmp_path, capfd, calib):
    rng = np.random.default_rng(0)
    weight = numpy_helper.from_array((rng.standard_normal((4, 3, 3, 3)) * 0.3).astype(np.float32), "w")
    graph = helper.make_graph(
        [helper.make_node("Conv", ["x", "w"], ["c"], pads=[1, 1, 1, 1]), helper.make_node("Sigmoid", ["c"], ["s"]),
         helper.make_node("GlobalAveragePool", ["s"], ["p"]), helper.make_node("Flatten", ["p"], ["y"])], "sig",
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, [1, 3, 8, 8])],
        [helper.make_tensor_value_info("y", TensorProto.FLOAT, [1, 4])], [weight])
    path = _save(helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)]), tmp_path / "sig.onnx")
    out = tmp_path / "out"
    message = assert_refused(capfd, check_args(path, calib, out, "--no-accuracy-gate", "--export", tmp_path / "exp"),
                             tmp_path / "exp", f"export: {out}/sig_int8.onnx: layer 'Sigmoid_1' (Sigmoid) has no "
                             "layer kind in the export (exported: Add, AveragePool, Clip, Concat, Conv,")
    assert "Relu" in message
    assert not out.exists()  # the int8 model named in the message is not written either


@pytest.mark.parametrize("args, fragment", [
    (["--alignment", "3"], "--alignment: must be a power of two, got 3"),
    (["--cycles-per-mac", "2"], "--cycles-per-mac and --clock-mhz go together (latency = MACs x cycles / clock)"),
    (["--meta-bytes-per-layer", "-1"], "--meta-bytes-per-layer: must be >= 0, got -1"),
    (["--flash-reserve", "-1"], "--flash-reserve: cannot read '-1' as a size (use bytes, or a number with KiB/MiB/k/M)"),
    (["--order-time-limit", "601"], "--order-time-limit: must be between 0 and 600 seconds, got 601.0"),
    (["--order-time-limit", "-1"], "--order-time-limit: must be at least 0, got -1.0"),
])
def test_bad_input_budget_option_round_three(tmp_path, capfd, model, args, fragment):
    assert_refused(capfd, ["budget", model, *SIZES, *args], tmp_path / "none", fragment)


@pytest.mark.parametrize("flash, fragment", [
    ("1.5", "--flash: '1.5' is not a whole number of bytes"),
    ("1" * 60, "--flash: '" + "1" * 40 + "...' has too many digits to be a size"),
])
def test_bad_input_size_not_whole_or_too_long(tmp_path, capfd, model, flash, fragment):
    assert_refused(capfd, ["budget", model, "--flash", flash, "--sram", "1KiB"], tmp_path / "none", fragment)


def test_bad_input_budget_json_is_a_folder_or_in_a_missing_one(tmp_path, capfd, model):
    assert_refused(capfd, ["budget", model, *SIZES, "--json", tmp_path], tmp_path / "none",
                   f"--json: {tmp_path} is a folder; give a file name")
    missing = tmp_path / "nodir" / "x.json"
    assert_refused(capfd, ["budget", model, *SIZES, "--json", missing], tmp_path / "nodir",
                   f"--json: folder {tmp_path / 'nodir'} does not exist")


def _tiny_model(path, inputs, output_dims, nodes, opset_domain=""):
    graph = helper.make_graph(nodes, "tiny", inputs, [helper.make_tensor_value_info("y", TensorProto.FLOAT, output_dims)])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid(opset_domain, 17)])
    model.ir_version = 9
    with open(path, "wb") as f:  # no checker on save: these models are meant to be refused
        f.write(model.SerializeToString())
    return str(path)


def _float_input(name, dims):
    return helper.make_tensor_value_info(name, TensorProto.FLOAT, dims)


def test_bad_input_model_file_with_no_graph(tmp_path, capfd):
    path = tmp_path / "nograph.onnx"
    path.write_bytes(onnx.ModelProto(ir_version=9, producer_name="x").SerializeToString())
    assert_refused(capfd, ["budget", path, *SIZES], tmp_path / "none",
                   f"model: {path}: not an ONNX model (no graph in the file)")


def test_bad_input_model_with_no_operators(tmp_path, capfd):
    graph = helper.make_graph([], "empty", [_float_input("x", [1, 3, 8, 8])], [_float_input("x", [1, 3, 8, 8])])
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 9
    path = _save(model, tmp_path / "noops.onnx")
    assert_refused(capfd, ["budget", path, *SIZES], tmp_path / "none",
                   f"model: {path}: has no operators; there is nothing to quantize")


def test_bad_input_model_input_that_is_not_a_tensor(tmp_path, capfd):
    sequence = helper.make_tensor_sequence_value_info("x", TensorProto.FLOAT, [1, 3])
    path = _tiny_model(tmp_path / "seq.onnx", [sequence], [],
                       [helper.make_node("SequenceLength", ["x"], ["n"]), helper.make_node("Cast", ["n"], ["y"], to=1)])
    assert_refused(capfd, ["budget", path, *SIZES], tmp_path / "none", f"model: {path}: input 'x' is not a tensor")


def test_bad_input_batchnorm_folding_that_overflows_float32(tmp_path, capfd):
    inits = [numpy_helper.from_array(np.ones((3, 3, 1, 1), np.float32), "w"),
             numpy_helper.from_array(np.full(3, 1e30, np.float32), "sc"),
             numpy_helper.from_array(np.zeros(3, np.float32), "bb"),
             numpy_helper.from_array(np.zeros(3, np.float32), "mu"),
             numpy_helper.from_array(np.full(3, 1e-30, np.float32), "var")]
    graph = helper.make_graph(
        [helper.make_node("Conv", ["x", "w"], ["c"]),
         helper.make_node("BatchNormalization", ["c", "sc", "bb", "mu", "var"], ["y"], name="bn", epsilon=0.0)],
        "bn", [_float_input("x", [1, 3, 8, 8])], [_float_input("y", [1, 3, 8, 8])], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    model.ir_version = 9
    path = _save(model, tmp_path / "bnbig.onnx")
    assert_refused(capfd, ["budget", path, *SIZES], tmp_path / "none",
                   f"model: {path}: folding BatchNormalization 'bn' gives values outside the float32 range "
                   "(check its scale, mean and variance)")


def _two_input_model(tmp_path):
    return _tiny_model(tmp_path / "two.onnx", [_float_input("a", [1, 3, 8, 8]), _float_input("b", [1, 3, 8, 8])],
                       [1, 3, 8, 8], [helper.make_node("Add", ["a", "b"], ["y"])])


def test_bad_input_npy_for_a_two_input_model(tmp_path, capfd, calib):
    path = _two_input_model(tmp_path)
    assert_refused(capfd, check_args(path, calib, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: {calib}/sample_000.npy: a .npy holds one array but the model has 2 inputs "
                   "(a, b); use .npz files keyed by input name")


def test_bad_input_images_for_a_two_input_model(tmp_path, capfd):
    from test_bad_input import write_png
    path = _two_input_model(tmp_path)
    images = tmp_path / "images"
    write_png(str(images / "a.png"), 8, 8)
    assert_refused(capfd, check_args(path, images, tmp_path / "out"), tmp_path / "out",
                   f"calibration data: {images} holds images but the model has 2 inputs (a, b); images feed "
                   "single-input models only, use .npz files keyed by input name")


def test_bad_input_images_for_a_flat_input(tmp_path, capfd):
    from test_bad_input import write_png
    path = _tiny_model(tmp_path / "flat.onnx", [_float_input("x", [1, 16])], [1, 16],
                       [helper.make_node("Relu", ["x"], ["y"])])
    images = tmp_path / "images"
    write_png(str(images / "a.png"), 8, 8)
    assert_refused(capfd, check_args(path, images, tmp_path / "out"), tmp_path / "out",
                   "calibration data: images need a 4-D model input (batch, channels, H, W), but input 'x' has "
                   "shape (1, 16)")


def test_bad_input_sixteen_bit_image(tmp_path, capfd):
    from PIL import Image
    path = _tiny_model(tmp_path / "gray.onnx", [_float_input("x", [1, 1, 8, 8])], [1, 1, 8, 8],
                       [helper.make_node("Relu", ["x"], ["y"])])
    images = tmp_path / "images"
    images.mkdir()
    Image.fromarray(np.zeros((8, 8), np.uint16)).save(images / "a.png")
    assert_refused(capfd, check_args(path, images, tmp_path / "out", "--color", "L"), tmp_path / "out",
                   f"calibration data: {images}/a.png: image mode I;16 has more than 8 bits per channel; convert it "
                   "to 8-bit or save the sample as .npy")


@pytest.mark.parametrize("second_row, fragment", [
    (b"/etc/passwd,1", "line 3: '/etc/passwd' is an absolute path; paths are relative to the data folder"),
    (b"notes.txt,1", "line 3: 'notes.txt': not an image or .npy/.npz file in {calib}"),
    (b"sam\xffple.npy,1", "not UTF-8 text (bad byte at offset 31)"),
    (b'"a\x00b.npy",1', "line 3: file path contains a NUL character"),
])
def test_bad_input_labels_csv_row_after_a_good_one(tmp_path, capfd, model, calib, second_row, fragment):
    labels = tmp_path / "labels.csv"
    labels.write_bytes(b"file,label\nsample_000.npy,1\n" + second_row + b"\n")
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", "--eval", calib, "--labels", labels),
                   tmp_path / "out", f"labels CSV {labels}: " + fragment.format(calib=calib))


@pytest.mark.parametrize("content, fragment", [
    (b'{"size": "\xff"}', "not UTF-8 text (bad byte at offset 10)"),
    (b"[" * 100000 + b"]" * 100000, "not valid JSON (nested too deeply)"),
])
def test_bad_input_preprocess_file_unreadable_text(tmp_path, capfd, model, content, fragment):
    from test_bad_input import write_png
    images = tmp_path / "images"
    write_png(str(images / "a.png"), 8, 8)
    pre = tmp_path / "pre.json"
    pre.write_bytes(content)
    assert_refused(capfd, check_args(model, images, tmp_path / "out", "--preprocess", pre), tmp_path / "out",
                   f"preprocess file {pre}: {fragment}")


@pytest.mark.parametrize("args, fragment", [
    (["--no-accuracy-gate", "--max-drop", "1"],
     "--no-accuracy-gate: cannot be combined with --max-drop, which sets the gate it turns off"),
    (["--no-accuracy-gate", "--gate-upper-bound"],
     "--no-accuracy-gate: cannot be combined with --gate-upper-bound, which sets the gate it turns off"),
    (["--prefix", "board"], "--prefix: applies to the C export only; add --export DIR"),
    (["--export-alignment", "64"], "--export-alignment: applies to the C export only; add --export DIR")])
def test_bad_input_check_options_that_would_be_ignored(tmp_path, capfd, model, calib, args, fragment):
    """An option that could not take effect is refused rather than silently dropped."""
    assert_refused(capfd, check_args(model, calib, tmp_path / "out", *args), tmp_path / "out", fragment)
