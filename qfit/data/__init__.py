"""data: a calibration / evaluation folder -> batches of model input arrays (+ labels).

A folder holds either images (preprocessed here) or .npy/.npz arrays (fed as they are), one sample
per file. Construction lists the files, attaches labels, applies `limit` and checks each chosen
file's header cheaply; pixels and array contents are read only while `batches()` streams, so memory
holds the file list, never the samples. See docs/data.md for the formats and every error.

folder.py   discovery, labels wiring, sampling, streaming (DataFolder, Batch)
images.py   Preprocess and Pillow decoding of one image
arrays.py   .npy/.npz headers and reading of one sample
labels.py   the labels CSV, class subfolders and the class order
samples.py  what a sample file is, shared failure types
This file only re-exports the names other layers use.
"""
from qfit.data.folder import Batch, DataFolder
from qfit.data.images import (COLOR_MODES, LAYOUTS, RESIZE_MODES, Preprocess, check_preprocess,
                              load_preprocess)
from qfit.data.labels import (MAX_CLASS_INDEX, check_class_order, parse_labels_csv, read_class_order,
                              read_labels_csv)
from qfit.data.samples import ARRAY_EXTENSIONS, IMAGE_EXTENSIONS

__all__ = [
    "ARRAY_EXTENSIONS", "Batch", "COLOR_MODES", "DataFolder", "IMAGE_EXTENSIONS", "LAYOUTS", "MAX_CLASS_INDEX",
    "Preprocess", "RESIZE_MODES", "check_class_order", "check_preprocess", "load_preprocess",
    "parse_labels_csv", "read_class_order", "read_labels_csv",
]
