"""Acceptance on a model trained on open data: the digits CNN (tests/models/README.md) through qfit.

Data: the UCI "Optical Recognition of Handwritten Digits" set as bundled with scikit-learn
(sklearn.datasets.load_digits), split as the training script split it. Calibration uses training
images only; evaluation the 540 held-out images, labelled by class subfolders. A McNemar-style interval
on the drop belongs to tests/test_sensitivity.py; this is the basic acceptance figure.
"""
from __future__ import annotations

import json
import pathlib

import numpy as np
import onnx
import onnxruntime as ort
import pytest

from qfit import cli

MODEL = pathlib.Path(__file__).resolve().parent / "models" / "digits_cnn.onnx"
CALIBRATION_IMAGES = 200


def digits_split():
    """train_test_split(test_size=0.3, random_state=0, stratify=y) on pixels / 16, as the training
    script (tests/models/train_digits.py) did."""
    from sklearn.datasets import load_digits
    from sklearn.model_selection import train_test_split

    digits = load_digits()
    images = (digits.images.astype(np.float32) / 16.0)[:, None, :, :]
    return train_test_split(images, digits.target, test_size=0.3, random_state=0, stratify=digits.target)


@pytest.fixture(scope="module")
def digits_run(tmp_path_factory):
    root = tmp_path_factory.mktemp("digits")
    x_train, x_test, _, y_test = digits_split()
    calib = root / "calib"
    calib.mkdir()
    # a seeded sample of training images, never the held-out ones
    for i in np.random.default_rng(0).choice(len(x_train), CALIBRATION_IMAGES, replace=False):
        np.save(calib / f"train_{i:04d}.npy", x_train[i])
    heldout = root / "heldout"
    for i, (image, label) in enumerate(zip(x_test, y_test)):
        folder = heldout / str(int(label))
        folder.mkdir(parents=True, exist_ok=True)
        np.save(folder / f"test_{i:03d}.npy", image)
    out = root / "out"
    code = cli.main(["check", str(MODEL), "--calib", str(calib), "--eval", str(heldout), "--out", str(out),
                     "--input-shape", "image=1x1x8x8", "--flash", "256KiB", "--sram", "64KiB",
                     "--max-drop", "0.5", "--quiet"])
    report = json.loads((out / "report.json").read_text())
    int8 = onnx.load(str(out / report["outputs"]["model"]))
    return code, report, int8, x_test, y_test


def test_digits_heldout_accuracy_float_and_int8_drop_at_most_half_a_point(digits_run):
    code, report, _, _, y_test = digits_run
    accuracy = report["accuracy"]
    assert accuracy["metric"] == "top1" and accuracy["samples"] == len(y_test) == 540
    # tests/models/README.md: the training run recorded 98.70 % (533 / 540) held out, in torch and ORT
    assert accuracy["float"] == pytest.approx(100 * 533 / 540, abs=0.01)
    assert accuracy["int8"] >= accuracy["float"] - 0.5
    assert accuracy["drop_pt"] <= 0.5
    assert code == 0 and report["verdict"]["accuracy_ok"] and not report["verdict"]["failed"]


def test_digits_int8_file_gives_the_reported_accuracy_in_onnxruntime(digits_run):
    _, report, int8, x_test, y_test = digits_run
    # The written file, run by a plain onnxruntime session one image at a time (the model's batch is
    # fixed at 1 by --input-shape), must reproduce the int8 figure in the report to one image.
    session = ort.InferenceSession(int8.SerializeToString(), providers=["CPUExecutionProvider"])
    name = session.get_inputs()[0].name
    predictions = np.array([session.run(None, {name: x[None]})[0].argmax() for x in x_test])
    correct = int((predictions == y_test).sum())
    assert abs(100 * correct / len(y_test) - report["accuracy"]["int8"]) <= 100 / len(y_test) + 1e-9
    assert correct >= 533 - 2  # at most 0.5 pt (2.7 images) below the float model's 533


def test_digits_budget_counts_the_folded_model(digits_run):
    _, report, _, _, _ = digits_run
    # tests/models/README.md: 14,378 params after folding BN into conv biases, 451,904 MACs per image
    assert report["model"]["params"] == 14_378
    assert report["model"]["macs"] == 451_904
    assert report["verdict"]["fits_flash"] and report["verdict"]["fits_sram"]
