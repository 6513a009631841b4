"""What a sample file is (an image or a .npy/.npz array, by extension) and the failure types and
message helpers that the folder, image and array readers share."""
from __future__ import annotations

import os

IMAGE_EXTENSIONS = (".png", ".jpg", ".jpeg", ".bmp", ".pgm", ".ppm")
ARRAY_EXTENSIONS = (".npy", ".npz")

# Decoders of foreign formats (Pillow plugins, numpy's header parser built on ast.literal_eval, zlib)
# raise many exception types on damaged bytes; at those boundaries any Exception means "unreadable".
DECODE_ERRORS = (Exception,)


class SkippableError(Exception):
    """A file that cannot be decoded at all: with skip_bad it is skipped, otherwise it is an error."""


def extension_of(path: str) -> str:
    return os.path.splitext(path)[1].lower()


def is_data_file(path: str) -> bool:
    return extension_of(path) in IMAGE_EXTENSIONS + ARRAY_EXTENSIONS


def shape_text(shape) -> str:
    return "(" + ", ".join(str(d) for d in shape) + ")"


def first_line(error: Exception) -> str:
    text = str(error).strip() or type(error).__name__
    return text.splitlines()[0]
