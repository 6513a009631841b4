"""Class order (--class-order) and preprocessing options with array data.

Model and data: the digits CNN and scikit-learn's bundled optical-digits set (tests/digits_folders.py);
tests/models/README.md records its held-out float accuracy, 533 / 540.
"""
from __future__ import annotations

import pathlib
import sys

import numpy as np
import onnxruntime as ort
import pytest

sys.path.insert(0, str(pathlib.Path(__file__).resolve().parent))
import digits_folders  # noqa: E402

from qfit.data import DataFolder, Preprocess, read_class_order  # noqa: E402
from qfit.errors import QfitError  # noqa: E402

NAMES = ["zero", "one", "two", "three", "four", "five", "six", "seven", "eight", "nine"]  # model output order


@pytest.fixture(scope="module")
def flat_eval_with_names(tmp_path_factory):
    """The 540 held-out digits in one flat folder, labelled by a CSV of class names."""
    root = tmp_path_factory.mktemp("digits_names")
    _, x_test, _, y_test = digits_folders.digits_split()
    folder = root / "eval"
    folder.mkdir()
    rows = ["file,label"]
    for i, (x, label) in enumerate(zip(x_test, y_test)):
        np.save(folder / f"test_{i:04d}.npy", x[None])
        rows.append(f"test_{i:04d}.npy,{NAMES[int(label)]}")
    csv_path = root / "labels.csv"
    csv_path.write_text("\n".join(rows) + "\n")
    return str(folder), str(csv_path)


def _float_top1(folder: DataFolder) -> float:
    session = ort.InferenceSession(str(digits_folders.MODEL), providers=["CPUExecutionProvider"])
    name = session.get_inputs()[0].name
    correct = 0
    for batch in folder.batches(1):  # the committed model has batch 1
        correct += int(session.run(None, {name: batch.inputs[name]})[0].argmax() == batch.labels[0])
    return 100.0 * correct / len(folder)


def test_csv_of_class_names_without_an_order_is_refused(flat_eval_with_names):
    folder, csv_path = flat_eval_with_names
    # Before: the names were numbered alphabetically ("eight" = 0, ...), and the model scored near chance.
    with pytest.raises(QfitError, match=r"labels are class names .* --class-order"):
        DataFolder(folder, digits_folders.INPUT_SHAPES, labels_csv=csv_path, role="evaluation", num_classes=10)


def test_csv_of_class_names_with_the_model_order_scores_the_trained_accuracy(flat_eval_with_names, tmp_path):
    folder, csv_path = flat_eval_with_names
    order_file = tmp_path / "classes.txt"
    order_file.write_text("\n".join(NAMES) + "\n")
    for spec in (",".join(NAMES), str(order_file)):
        data = DataFolder(folder, digits_folders.INPUT_SHAPES, labels_csv=csv_path, role="evaluation",
                          num_classes=10, class_order=read_class_order(spec))
        assert data.describe()["class_order"] == "given"
        # tests/models/README.md: 533 of the 540 held-out digits in float
        assert _float_top1(data) == pytest.approx(100 * 533 / 540, abs=1e-9)
    # the alphabetical numbering the tool used to guess: the same model falls to chance level
    guessed = DataFolder(folder, digits_folders.INPUT_SHAPES, labels_csv=csv_path, role="evaluation",
                         num_classes=10, class_order=sorted(NAMES))
    assert _float_top1(guessed) < 30.0


def test_class_order_renames_and_reorders_class_subfolders(tmp_path):
    _, evaluation = digits_folders.write_folders(tmp_path)
    order = [str(d) for d in range(10)]
    plain = DataFolder(evaluation, digits_folders.INPUT_SHAPES, role="evaluation", num_classes=10)
    given = DataFolder(evaluation, digits_folders.INPUT_SHAPES, role="evaluation", num_classes=10,
                       class_order=order[::-1])
    assert plain.describe()["class_order"] == "subfolder names, sorted"
    assert np.array_equal(given.labels, 9 - plain.labels)
    with pytest.raises(QfitError, match="subfolder '9' .* is not in the class order"):
        DataFolder(evaluation, digits_folders.INPUT_SHAPES, num_classes=10, class_order=order[:9] + ["ten"])


@pytest.mark.parametrize("spec, message", [
    ("a,b,a", "class 'a' is listed twice"),
    ("a,,b", "an empty class name"),
    ("no_such_file_and_no_comma", "neither a file nor a comma-separated list"),
])
def test_bad_class_orders_are_refused_in_one_line(spec, message):
    with pytest.raises(QfitError, match=message):
        read_class_order(spec)


def test_class_order_must_name_every_output(flat_eval_with_names):
    folder, csv_path = flat_eval_with_names
    with pytest.raises(QfitError, match="names 9 classes but the model has 10 outputs"):
        DataFolder(folder, digits_folders.INPUT_SHAPES, labels_csv=csv_path, num_classes=10, class_order=NAMES[:9])


@pytest.mark.parametrize("preprocess", [Preprocess(), Preprocess(mean=(0.5,), std=(0.2,))])
def test_preprocessing_options_with_array_data_are_refused(preprocess, tmp_path):
    calib, _ = digits_folders.write_folders(tmp_path, calibration_images=4)
    with pytest.raises(QfitError, match=r"holds \.npy/\.npz arrays.*apply to images only"):
        DataFolder(calib, digits_folders.INPUT_SHAPES, preprocess=preprocess)
    assert len(DataFolder(calib, digits_folders.INPUT_SHAPES)) == 4  # without options: read as they are
