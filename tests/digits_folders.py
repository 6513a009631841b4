"""The digits CNN's data as qfit folders, and deliberately damaged copies of the model.

Data: the UCI "Optical Recognition of Handwritten Digits" set bundled with scikit-learn, split as
tests/models/train_digits.py split it (test_size=0.3, random_state=0, stratify=y), pixels / 16,
laid out (1, 1, 8, 8). Calibration: the first training images; evaluation: the 540 held-out images
in class subfolders "0".."9" (sorted names = class indices).
"""
from __future__ import annotations

import pathlib

import numpy as np
import onnx
from onnx import numpy_helper

MODEL = pathlib.Path(__file__).resolve().parent / "models" / "digits_cnn.onnx"
INPUT_SHAPES = {"image": (1, 1, 8, 8)}
HEAVY_LAYER = "/features/features.3/Conv"     # 32x16x3x3 conv, 295k of the 452k MACs
HEAVY_WEIGHT = "features.3.weight"


def digits_split():
    from sklearn.datasets import load_digits
    from sklearn.model_selection import train_test_split

    digits = load_digits()
    images = (digits.images.astype(np.float32) / 16.0)[:, None, :, :]
    return train_test_split(images, digits.target, test_size=0.3, random_state=0, stratify=digits.target)


def write_folders(root: pathlib.Path, calibration_images: int = 200) -> tuple[str, str]:
    """(calibration folder, evaluation folder) of .npy files, one image each."""
    x_train, x_test, _, y_test = digits_split()
    calib, evaluation = root / "calib", root / "eval"
    calib.mkdir(parents=True)
    for i, x in enumerate(x_train[:calibration_images]):
        np.save(calib / f"train_{i:04d}.npy", x[None])
    for i, (x, label) in enumerate(zip(x_test, y_test)):
        folder = evaluation / str(int(label))
        folder.mkdir(parents=True, exist_ok=True)
        np.save(folder / f"test_{i:04d}.npy", x[None])
    return str(calib), str(evaluation)


def with_weight_outlier(path: pathlib.Path, weight: str = HEAVY_WEIGHT, factor: float = 40.0) -> str:
    """A copy of the digits CNN whose largest |weight| in `weight` is multiplied by `factor`."""
    model = onnx.load(str(MODEL))
    for init in model.graph.initializer:
        if init.name == weight:
            array = numpy_helper.to_array(init).copy()
            index = np.unravel_index(np.argmax(np.abs(array)), array.shape)
            array[index] *= factor
            init.CopyFrom(numpy_helper.from_array(array, weight))
    onnx.save(model, str(path))
    return str(path)
