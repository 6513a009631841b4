"""data: a calibration / evaluation folder -> batches of model input arrays (+ labels).

A folder holds either images (preprocessed here) or .npy/.npz arrays (fed as they are), one sample
per file. Construction lists the files, attaches labels, applies `limit` and checks each chosen
file's header cheaply; pixels and array contents are read only while `batches()` streams, so memory
holds the file list, never the samples. See docs/data.md for the formats and every error.
"""
from __future__ import annotations

import csv
import io
import json
import math
import os
import posixpath
import zipfile
from dataclasses import dataclass, fields
from typing import Iterator

import numpy as np
from PIL import Image

from qfit.errors import QfitError
from qfit.files import MAX_SMALL_FILE_BYTES, NOT_REGULAR_REASON, read_regular_file, split_regular

IMAGE_EXTENSIONS = (".png", ".jpg", ".jpeg", ".bmp", ".pgm", ".ppm")
ARRAY_EXTENSIONS = (".npy", ".npz")

RESIZE_MODES = ("bilinear", "nearest", "bicubic", "area")
COLOR_MODES = ("RGB", "BGR", "L")
LAYOUTS = ("NCHW", "NHWC")

_RESAMPLING = getattr(Image, "Resampling", Image)  # Pillow < 9.1 keeps the constants on Image
_PILLOW_FILTER = {
    "bilinear": _RESAMPLING.BILINEAR,
    "nearest": _RESAMPLING.NEAREST,
    "bicubic": _RESAMPLING.BICUBIC,
    "area": _RESAMPLING.BOX,  # a box filter averages the source pixels each output pixel covers
}
# Pillow modes with more than 8 bits per channel: converting them to RGB/L clips silently, so refuse.
_WIDE_PIXEL_MODES = ("I", "F")

_NPY_MAGIC = b"\x93NUMPY"
_PICKLE_PROTOCOL_BYTE = 0x80  # first byte of a pickle stream, protocol 2 and newer
MAX_CLASS_INDEX = 2 ** 31 - 1
_NUMERIC_KINDS = "biuf"  # bool, signed, unsigned, float; complex would lose its imaginary part
# Decoders of foreign formats (Pillow plugins, numpy's header parser built on ast.literal_eval, zlib)
# raise many exception types on damaged bytes; at those boundaries any Exception means "unreadable".
_DECODE_ERRORS = (Exception,)


# ------------------------------------------------------------------------------------ preprocess

@dataclass
class Preprocess:
    """How an image becomes a model input: x = (pixel * scale - mean) / std, per channel."""

    size: tuple[int, int] | None = None   # (H, W); None = the model input's H, W
    resize: str = "bilinear"              # used only when an image's size differs from `size`
    color: str = "RGB"                    # BGR = RGB with the channel order reversed
    layout: str = "NCHW"
    scale: float = 1 / 255
    mean: tuple[float, ...] = (0.0,)      # 1 value or one per channel, in the model's channel order
    std: tuple[float, ...] = (1.0,)


def _is_number(value) -> bool:
    return isinstance(value, (int, float)) and not isinstance(value, bool)


def _check_preprocess_value(key: str, value, where: str):
    """Return `value` normalised for field `key`, or raise naming the key."""
    def bad(expected: str):
        shown = json.dumps(value) if _jsonable(value) else repr(value)
        raise QfitError(f"{where}: key '{key}': {expected}, got {shown}")

    if key == "size":
        if value is None:
            return None
        if (not isinstance(value, (list, tuple)) or len(value) != 2
                or not all(isinstance(v, int) and not isinstance(v, bool) and v > 0 for v in value)):
            bad("expected [H, W] with two positive integers, or null")
        return (int(value[0]), int(value[1]))
    if key in ("resize", "color", "layout"):
        allowed = {"resize": RESIZE_MODES, "color": COLOR_MODES, "layout": LAYOUTS}[key]
        if value not in allowed:
            bad("expected one of " + ", ".join(f'"{a}"' for a in allowed))
        return value
    if key == "scale":
        if not _is_number(value) or not math.isfinite(value) or value <= 0:
            bad("expected a positive number")
        return float(value)
    if key in ("mean", "std"):
        values = [value] if _is_number(value) else value
        if (not isinstance(values, (list, tuple)) or not values
                or not all(_is_number(v) and math.isfinite(v) for v in values)):
            bad("expected a number or a non-empty list of numbers")
        if key == "std" and any(v <= 0 for v in values):
            bad("every std value must be positive (it divides)")
        return tuple(float(v) for v in values)
    raise AssertionError(key)


def _jsonable(value) -> bool:
    try:
        json.dumps(value)
        return True
    except (TypeError, ValueError):
        return False


def check_preprocess(preprocess: Preprocess, where: str = "preprocess") -> Preprocess:
    """Validate a Preprocess built in code (the CLI, tests) the same way as one read from JSON."""
    values = {f.name: _check_preprocess_value(f.name, getattr(preprocess, f.name), where)
              for f in fields(Preprocess)}
    return Preprocess(**values)


def load_preprocess(path: str) -> Preprocess:
    """Read a preprocessing JSON file whose keys are the Preprocess fields; missing keys keep defaults."""
    where = f"preprocess file {path}"
    try:
        text = read_regular_file(path, MAX_SMALL_FILE_BYTES, where).decode("utf-8")
    except UnicodeDecodeError as e:
        raise QfitError(f"{where}: not UTF-8 text (bad byte at offset {e.start})") from None
    try:
        config = json.loads(text)
    except json.JSONDecodeError as e:
        raise QfitError(f"{where}: not valid JSON ({e.msg} at line {e.lineno}, column {e.colno})") from None
    except RecursionError:
        raise QfitError(f"{where}: not valid JSON (nested too deeply)") from None
    if not isinstance(config, dict):
        raise QfitError(f"{where}: expected a JSON object with keys like \"size\", \"mean\", \"std\"")
    known = [f.name for f in fields(Preprocess)]
    unknown = sorted(set(config) - set(known))
    if unknown:
        raise QfitError(f"{where}: unknown key '{unknown[0]}' (known keys: {', '.join(known)})")
    values = {key: _check_preprocess_value(key, value, where) for key, value in config.items()}
    return Preprocess(**values)


# ------------------------------------------------------------------------------------ batches

@dataclass
class Batch:
    inputs: dict[str, np.ndarray]   # input name -> float32 array with leading batch dim B
    labels: np.ndarray | None       # int64 (B,) or None
    files: list[str]                # relative paths of the samples, in order


class _SkippableError(Exception):
    """A file that cannot be decoded at all: with skip_bad it is skipped, otherwise it is an error."""


def _extension(path: str) -> str:
    return os.path.splitext(path)[1].lower()


def _is_data_file(path: str) -> bool:
    return _extension(path) in IMAGE_EXTENSIONS + ARRAY_EXTENSIONS


def _discover(folder: str) -> tuple[list[str], list[str], list[str]]:
    """(data files, other files, top-level subfolders), relative with '/', sorted; hidden entries skipped."""
    data_files, other_files, top_dirs = [], [], []
    visited = set()
    # Links are followed (class folders are often linked into a split); a folder seen before is not
    # walked again, which also stops link cycles.
    for root, dirs, names in os.walk(folder, followlinks=True):
        real = os.path.realpath(root)
        if real in visited:
            dirs[:] = []
            continue
        visited.add(real)
        # Sorted so that a folder reachable twice is always listed under the same path; hidden
        # folders are pruned from the walk.
        dirs[:] = sorted(d for d in dirs if not d.startswith("."))
        rel_root = os.path.relpath(root, folder)
        if rel_root == ".":
            top_dirs = list(dirs)
        for name in names:
            if name.startswith("."):
                continue
            rel = name if rel_root == "." else posixpath.join(rel_root.replace(os.sep, "/"), name)
            (data_files if _is_data_file(name) else other_files).append(rel)
    return sorted(data_files), sorted(other_files), sorted(top_dirs)


class DataFolder:
    """The samples of one folder, their labels, and a streaming batch iterator."""

    def __init__(self, folder: str, inputs: dict[str, tuple[int, ...]], preprocess: Preprocess | None = None,
                 labels_csv: str | None = None, limit: int | None = None, seed: int = 0,
                 skip_bad: bool = False, role: str = "calibration", num_classes: int | None = None,
                 class_order: list[str] | None = None):
        """`preprocess` None: the user gave no preprocessing (arrays refuse one that was given).
        `class_order`: the class names in the order of the model's outputs (see read_class_order)."""
        self.folder = folder
        self.role = role
        self.skip_bad = skip_bad
        self.preprocess = check_preprocess(preprocess or Preprocess())
        self.input_shapes = {name: tuple(int(d) for d in shape) for name, shape in inputs.items()}
        self.skipped: list[tuple[str, str]] = []
        self.class_names: list[str] | None = None
        self.labels: np.ndarray | None = None
        self.label_source: str | None = None
        self.class_order_source: str | None = None
        if class_order is not None:
            check_class_order(class_order, num_classes)
        if not self.input_shapes:
            raise QfitError(f"{role} data: the model has no inputs to feed")
        for name, shape in self.input_shapes.items():
            if not shape or any(d <= 0 for d in shape):
                raise QfitError(f"{role} data: model input '{name}' has shape {_shape_text(shape)}; every "
                                f"dimension must be a fixed positive size (set it with --input-shape)")

        if not os.path.exists(folder):
            raise QfitError(f"{role} data: {folder}: no such folder")
        if not os.path.isdir(folder):
            raise QfitError(f"{role} data: {folder}: not a folder")
        data_files, other_files, top_dirs = _discover(folder)
        data_files, not_regular = split_regular(folder, data_files)  # a FIFO would block the pass forever
        self.skipped += [(rel, NOT_REGULAR_REASON) for rel in not_regular]
        if not data_files:
            count = len(other_files)
            found = f" (found {count} other file{'s' if count != 1 else ''}, e.g. {other_files[0]})" if count else ""
            raise QfitError(f"{role} data: no image or .npy/.npz files in {folder}{found}")

        files, labels = data_files, None
        if labels_csv is not None:
            subfolder_classes = top_dirs if all("/" in f for f in data_files) else None
            files, labels, self.class_names = read_labels_csv(
                labels_csv, set(data_files), folder, subfolder_classes, num_classes, class_order)
            self.label_source = "csv"
            if self.class_names is not None:
                self.class_order_source = "given" if class_order is not None else "subfolder names, sorted"
        elif top_dirs and all("/" in f for f in data_files):
            # Every sample sits in a top-level subfolder: those are the classes. Empty subfolders still
            # count, so that indices match the sorted class list the model was trained on (the order
            # folder-based training loaders use, common practice) unless the order is given.
            self.class_names = list(class_order) if class_order is not None else top_dirs
            self.class_order_source = "given" if class_order is not None else "subfolder names, sorted"
            unknown = sorted(set(top_dirs) - set(self.class_names))
            if unknown:
                raise QfitError(f"{role} data: subfolder '{unknown[0]}' of {folder} is not in the class order "
                                f"({', '.join(self.class_names[:10])}{', ...' if len(self.class_names) > 10 else ''})")
            class_index = {name: i for i, name in enumerate(self.class_names)}
            labels = [class_index[f.split("/", 1)[0]] for f in files]
            self.label_source = "subfolders"
            if num_classes is not None and len(top_dirs) > num_classes:
                raise QfitError(f"{role} data: {folder} has {len(top_dirs)} class subfolders but the model "
                                f"has {num_classes} classes")

        self.kind = self._kind_of(files)
        if self.kind == "arrays" and preprocess is not None:
            raise QfitError(f"{role} data: {folder} holds .npy/.npz arrays, which are fed to the model as they "
                            f"are; preprocessing options (--preprocess, --size, --color, --layout, --scale, "
                            f"--mean, --std) apply to images only: drop them or preprocess the arrays")
        if self.kind == "images":
            self._image_plan = self._plan_images()

        if limit is not None:
            if not isinstance(limit, (int, np.integer)) or isinstance(limit, bool) or limit <= 0:
                raise QfitError(f"{role} data: limit must be a positive number of samples, got {limit}")
            if limit < len(files):
                chosen = np.sort(np.random.default_rng(seed).choice(len(files), size=limit, replace=False))
                files = [files[i] for i in chosen]
                labels = None if labels is None else [labels[i] for i in chosen]

        self.files = list(files)
        self.labels = None if labels is None else np.asarray(labels, dtype=np.int64)
        self._check_headers()
        if not self.files:
            raise QfitError(f"{role} data: no readable files in {folder} ({len(self.skipped)} skipped as bad, "
                            f"first: {self.skipped[0][0]}: {self.skipped[0][1]})")

    # -------------------------------------------------------------------------------- public

    def __len__(self) -> int:
        return len(self.files)

    def batches(self, batch_size: int) -> Iterator[Batch]:
        """Yield batches of up to `batch_size` samples, reading files only as each batch is built."""
        if batch_size <= 0:
            raise QfitError(f"{self.role} data: batch size must be positive, got {batch_size}")
        pending: list[dict[str, np.ndarray]] = []
        pending_files: list[str] = []
        pending_labels: list[int] = []
        # A file skipped mid-pass replaces self.files/self.labels with new objects for later passes, so
        # holding the current ones is the snapshot; nothing per file is copied (memory must not grow
        # with the file count).
        files, labels = self.files, self.labels
        for index, rel in enumerate(files):
            label = None if labels is None else int(labels[index])
            try:
                sample = self._read_sample(rel)
            except _SkippableError as e:
                self._skip_late(rel, str(e))
                continue
            pending.append(sample)
            pending_files.append(rel)
            pending_labels.append(label)
            if len(pending) == batch_size:
                yield self._stack(pending, pending_files, pending_labels)
                pending, pending_files, pending_labels = [], [], []
        if pending:
            yield self._stack(pending, pending_files, pending_labels)

    def describe(self) -> dict:
        return {
            "folder": self.folder,
            "kind": self.kind,
            "samples": len(self.files),
            "skipped": len(self.skipped),
            "skipped_files": [{"file": f, "reason": r} for f, r in self.skipped],
            "labels": self.label_source,
            "class_names": self.class_names,
            "class_order": self.class_order_source,
        }

    # -------------------------------------------------------------------------------- internals

    def _where(self, rel: str) -> str:
        return f"{self.role} data: {os.path.join(self.folder, rel)}"

    def _kind_of(self, files: list[str]) -> str:
        images = [f for f in files if _extension(f) in IMAGE_EXTENSIONS]
        arrays = [f for f in files if _extension(f) in ARRAY_EXTENSIONS]
        if images and arrays:
            raise QfitError(f"{self.role} data: {self.folder} mixes images and arrays (e.g. {images[0]} and "
                            f"{arrays[0]}); use one kind per folder")
        return "images" if images else "arrays"

    def _plan_images(self) -> dict:
        """Where the model's single image input wants channels, its H, W, and the channel count."""
        if len(self.input_shapes) != 1:
            raise QfitError(f"{self.role} data: {self.folder} holds images but the model has "
                            f"{len(self.input_shapes)} inputs ({', '.join(self.input_shapes)}); "
                            f"images feed single-input models only, use .npz files keyed by input name")
        name, shape = next(iter(self.input_shapes.items()))
        p = self.preprocess
        if len(shape) != 4:
            raise QfitError(f"{self.role} data: images need a 4-D model input (batch, channels, H, W), but "
                            f"input '{name}' has shape {_shape_text(shape)}")
        channel_axis = 1 if p.layout == "NCHW" else 3
        model_channels = shape[channel_axis]
        color_channels = 1 if p.color == "L" else 3
        if model_channels != color_channels:
            other_axis = 3 if channel_axis == 1 else 1
            hint = ""
            if shape[other_axis] == color_channels:
                hint = f"; the shape suggests layout {'NHWC' if channel_axis == 1 else 'NCHW'}"
            elif model_channels in (1, 3):
                hint = f"; the model wants color {'L' if model_channels == 1 else 'RGB or BGR'}"
            raise QfitError(f"{self.role} data: model input '{name}' {_shape_text(shape)} has {model_channels} "
                            f"channels in layout {p.layout}, color {p.color} gives {color_channels}{hint}")
        for key, values in (("mean", p.mean), ("std", p.std)):
            if len(values) not in (1, color_channels):
                raise QfitError(f"preprocess: {key} has {len(values)} values; expected 1 or {color_channels} "
                                f"(one per channel for color {p.color})")
        model_hw = (shape[2], shape[3]) if p.layout == "NCHW" else (shape[1], shape[2])
        if p.size is not None and p.size != model_hw:
            raise QfitError(f"preprocess: size {p.size[0]}x{p.size[1]} (HxW) does not match model input "
                            f"'{name}' {_shape_text(shape)}, which wants {model_hw[0]}x{model_hw[1]}")
        return {"name": name, "hw": model_hw,
                "mean": np.asarray(p.mean, dtype=np.float32), "std": np.asarray(p.std, dtype=np.float32)}

    def _check_headers(self) -> None:
        """Cheap per-file checks at construction, so that shape errors and unreadable headers surface
        before any model runs. Full decoding happens in batches()."""
        good = []
        for rel in self.files:
            try:
                if self.kind == "images":
                    self._check_image_header(rel)
                else:
                    self._check_array_header(rel)
            except _SkippableError as e:
                if not self.skip_bad:
                    raise QfitError(f"{self._where(rel)}: {e} (pass skip_bad / --skip-bad to skip bad files)") from None
                self.skipped.append((rel, str(e)))
                continue
            good.append(rel)
        self._drop_files(set(self.files) - set(good))

    def _drop_files(self, bad: set[str]) -> None:
        if not bad:
            return
        keep = [i for i, f in enumerate(self.files) if f not in bad]
        self.files = [self.files[i] for i in keep]  # a new list: a running batches() loop keeps its own
        if self.labels is not None:
            self.labels = self.labels[keep]

    def _skip_late(self, rel: str, reason: str) -> None:
        if not self.skip_bad:
            raise QfitError(f"{self._where(rel)}: {reason} (pass skip_bad / --skip-bad to skip bad files)")
        self.skipped.append((rel, reason))
        self._drop_files({rel})

    def _stack(self, samples, files, labels) -> Batch:
        inputs = {name: np.concatenate([s[name] for s in samples], axis=0) for name in self.input_shapes}
        label_array = np.asarray(labels, dtype=np.int64) if self.labels is not None else None
        return Batch(inputs=inputs, labels=label_array, files=list(files))

    # ---- images

    def _check_image_header(self, rel: str) -> None:
        path = os.path.join(self.folder, rel)
        try:
            with Image.open(path) as img:
                mode, (width, height) = img.mode, img.size
                img.verify()  # checks the file's structure (e.g. PNG chunk CRCs) without decoding pixels
        except _DECODE_ERRORS as e:
            raise _SkippableError(f"cannot read image ({_first_line(e)})") from None
        self._check_image_mode_and_size(rel, mode, (height, width))

    def _check_image_mode_and_size(self, rel: str, mode: str, image_hw: tuple[int, int]) -> None:
        if mode.startswith(_WIDE_PIXEL_MODES):
            raise QfitError(f"{self._where(rel)}: image mode {mode} has more than 8 bits per channel; "
                            f"convert it to 8-bit or save the sample as .npy")
        plan = self._image_plan
        if self.preprocess.size is None and image_hw != plan["hw"]:
            raise QfitError(f"{self._where(rel)}: image is {image_hw[0]}x{image_hw[1]} (HxW) but the model input "
                            f"'{plan['name']}' wants {plan['hw'][0]}x{plan['hw'][1]}; images of mixed sizes or "
                            f"of another size need resizing: set a target size")

    def _read_sample(self, rel: str) -> dict[str, np.ndarray]:
        if self.kind == "images":
            return {self._image_plan["name"]: self._read_image(rel)}
        return self._read_arrays(rel)

    def _read_image(self, rel: str) -> np.ndarray:
        p, plan = self.preprocess, self._image_plan
        path = os.path.join(self.folder, rel)
        try:
            with Image.open(path) as img:
                img.load()
                self._check_image_mode_and_size(rel, img.mode, (img.size[1], img.size[0]))
                img = img.convert("L" if p.color == "L" else "RGB")
                height, width = plan["hw"]
                if img.size != (width, height):
                    img = img.resize((width, height), resample=_PILLOW_FILTER[p.resize])
                pixels = np.asarray(img, dtype=np.float32)
        except QfitError:
            raise
        except _DECODE_ERRORS as e:
            raise _SkippableError(f"cannot read image ({_first_line(e)})") from None
        if pixels.ndim == 2:
            pixels = pixels[:, :, None]
        if p.color == "BGR":
            pixels = pixels[:, :, ::-1]
        with np.errstate(over="ignore", invalid="ignore"):  # overflow to Inf is reported just below
            values = (pixels * np.float32(p.scale) - plan["mean"]) / plan["std"]
        if p.layout == "NCHW":
            values = values.transpose(2, 0, 1)
        values = np.ascontiguousarray(values[None], dtype=np.float32)
        if not np.isfinite(values).all():  # only reachable with extreme scale/mean/std values
            raise QfitError(f"{self._where(rel)}: preprocessing gives NaN or Inf; check scale, mean and std")
        return values

    # ---- arrays

    def _array_targets(self, rel: str, keys: list[str] | None) -> dict[str, str | None]:
        """Model input name -> .npz key (None for a .npy), or raise naming what does not line up."""
        names = list(self.input_shapes)
        if keys is None:
            if len(names) != 1:
                raise QfitError(f"{self._where(rel)}: a .npy holds one array but the model has {len(names)} inputs "
                                f"({', '.join(names)}); use .npz files keyed by input name")
            return {names[0]: None}
        if len(names) == 1 and len(keys) == 1:
            return {names[0]: keys[0]}
        if len(names) == 1 and names[0] in keys and len(keys) > 1:
            extra = sorted(set(keys) - set(names))
            raise QfitError(f"{self._where(rel)}: keys {', '.join(extra)} are not model inputs "
                            f"(the model's only input is '{names[0]}')")
        missing = [n for n in names if n not in keys]
        extra = sorted(set(keys) - set(names))
        if missing or extra:
            parts = []
            if missing:
                parts.append(f"no key for input(s) {', '.join(missing)}")
            if extra:
                parts.append(f"keys {', '.join(extra)} are not model inputs")
            raise QfitError(f"{self._where(rel)}: {'; '.join(parts)} (model inputs: {', '.join(names)})")
        return {n: n for n in names}

    def _check_array_shape_dtype(self, rel: str, what: str, name: str, shape: tuple, dtype: np.dtype) -> None:
        expected = self.input_shapes[name]
        sample = (1,) + tuple(expected[1:])
        if dtype.hasobject:
            raise QfitError(f"{self._where(rel)}: {what} contains pickled objects; refused")
        if dtype.kind not in _NUMERIC_KINDS:
            raise QfitError(f"{self._where(rel)}: {what} has dtype {dtype}, expected a numeric dtype "
                            f"(it is cast to float32) for input '{name}'")
        if tuple(shape) not in (sample, sample[1:]):
            stack_note = ""
            if len(shape) == len(sample) and tuple(shape[1:]) == sample[1:]:
                stack_note = f"; it stacks {shape[0]} samples, but each file must hold one sample"
            raise QfitError(f"{self._where(rel)}: {what} has shape {_shape_text(shape)}, expected "
                            f"{_shape_text(sample)} or {_shape_text(sample[1:])} for input '{name}'{stack_note}")

    def _check_array_header(self, rel: str) -> None:
        path = os.path.join(self.folder, rel)
        if _extension(rel) == ".npy":
            try:
                with open(path, "rb") as f:
                    shape, dtype = _read_npy_header(f)
            except _PickledError:
                raise QfitError(f"{self._where(rel)}: contains pickled objects; refused") from None
            except _DECODE_ERRORS as e:
                raise _SkippableError(f"cannot read .npy ({_first_line(e)})") from None
            name = next(iter(self._array_targets(rel, None)))
            self._check_array_shape_dtype(rel, "array", name, shape, dtype)
            return
        try:
            with zipfile.ZipFile(path) as archive:
                headers = {}
                for key, member in _npz_members(archive).items():
                    with archive.open(member) as f:
                        headers[key] = _read_npy_header(f)
        except _PickledError:
            raise QfitError(f"{self._where(rel)}: contains pickled objects; refused") from None
        except _DECODE_ERRORS as e:
            raise _SkippableError(f"cannot read .npz ({_first_line(e)})") from None
        if not headers:
            raise _SkippableError("cannot read .npz (it holds no arrays)")
        for name, key in self._array_targets(rel, sorted(headers)).items():
            shape, dtype = headers[key]
            self._check_array_shape_dtype(rel, f"key '{key}'", name, shape, dtype)

    def _read_arrays(self, rel: str) -> dict[str, np.ndarray]:
        path = os.path.join(self.folder, rel)
        try:
            if _extension(rel) == ".npy":
                targets = self._array_targets(rel, None)
                loaded = {None: np.load(path, allow_pickle=False)}
            else:
                with zipfile.ZipFile(path) as archive:
                    members = _npz_members(archive)
                    targets = self._array_targets(rel, sorted(members))
                    loaded = {}
                    for key in targets.values():
                        with archive.open(members[key]) as f:
                            loaded[key] = np.lib.format.read_array(f, allow_pickle=False)
        except QfitError:
            raise
        except _DECODE_ERRORS as e:
            if isinstance(e, ValueError) and "pickle" in str(e).lower():
                raise QfitError(f"{self._where(rel)}: contains pickled objects; refused") from None
            raise _SkippableError(f"cannot read array file ({_first_line(e)})") from None
        sample = {}
        for name, key in targets.items():
            array = loaded[key]
            what = "array" if key is None else f"key '{key}'"
            self._check_array_shape_dtype(rel, what, name, array.shape, array.dtype)
            with np.errstate(over="ignore", invalid="ignore"):  # overflow to Inf is reported just below
                values = np.asarray(array, dtype=np.float32).reshape((1,) + tuple(self.input_shapes[name][1:]))
            if not np.isfinite(values).all():
                bad = "NaN" if np.isnan(values).any() else "Inf"
                raise QfitError(f"{self._where(rel)}: {what} contains {bad} (after conversion to float32)")
            sample[name] = values
        return sample


# ------------------------------------------------------------------------------------ .npy headers

class _PickledError(Exception):
    pass


def _npz_members(archive: zipfile.ZipFile) -> dict[str, str]:
    """.npz key -> zip member; like np.savez, a key is the member name without '.npy'. Other members
    (none are written by numpy) are ignored."""
    return {m[:-4]: m for m in archive.namelist() if m.endswith(".npy")}


def _read_npy_header(f) -> tuple[tuple[int, ...], np.dtype]:
    """Shape and dtype from a .npy stream without reading the data; raises _PickledError for pickles."""
    start = f.read(len(_NPY_MAGIC))
    if not start.startswith(_NPY_MAGIC):
        if start[:1] and start[0] == _PICKLE_PROTOCOL_BYTE:
            raise _PickledError()
        raise ValueError("not a .npy file: no NumPy header")
    version = f.read(2)
    if len(version) != 2:
        raise ValueError("truncated NumPy header")
    major, minor = version[0], version[1]
    if (major, minor) == (1, 0):
        shape, _, dtype = np.lib.format.read_array_header_1_0(f)
    elif (major, minor) in ((2, 0), (3, 0)):
        # 3.0 differs from 2.0 only in allowing UTF-8 in field names, which read_array_header_2_0 accepts
        shape, _, dtype = np.lib.format.read_array_header_2_0(f)
    else:
        raise ValueError(f"unsupported .npy format version {major}.{minor}")
    if dtype.hasobject:
        raise _PickledError()
    return tuple(shape), dtype


# ------------------------------------------------------------------------------------ labels CSV

def read_class_order(spec: str) -> list[str]:
    """`--class-order`: a file with one class name per line (blank lines ignored), or else a
    comma-separated list of names, in the order of the model's outputs."""
    if os.path.isfile(spec):
        where = f"--class-order: {spec}"
        try:
            text = read_regular_file(spec, MAX_SMALL_FILE_BYTES, where).decode("utf-8-sig")
        except UnicodeDecodeError as e:
            raise QfitError(f"{where}: not UTF-8 text (bad byte at offset {e.start})") from None
        names = [line.strip() for line in text.splitlines() if line.strip()]
    elif "," in spec:
        names = [name.strip() for name in spec.split(",")]
    else:
        raise QfitError(f"--class-order: '{spec}' is neither a file nor a comma-separated list of class names")
    return check_class_order(names)


def check_class_order(names: list[str], num_classes: int | None = None) -> list[str]:
    """A class order names each class once, and as many classes as the model has outputs."""
    if any(not name for name in names):
        raise QfitError(f"--class-order: an empty class name (position {names.index('') + 1})")
    seen: set[str] = set()
    for name in names:
        if name in seen:
            raise QfitError(f"--class-order: class '{name}' is listed twice")
        seen.add(name)
    if num_classes is not None and len(names) != num_classes:
        raise QfitError(f"--class-order: names {len(names)} classes but the model has {num_classes} outputs")
    return list(names)


def read_labels_csv(csv_path: str, data_files: set[str], folder: str = ".",
                    class_names: list[str] | None = None,
                    num_classes: int | None = None,
                    class_order: list[str] | None = None) -> tuple[list[str], list[int], list[str] | None]:
    """Read a `file,label` CSV -> (sorted files, their labels, class names or None)."""
    where = f"labels CSV {csv_path}"
    raw = read_regular_file(csv_path, MAX_SMALL_FILE_BYTES, where)  # refuses missing, special, huge files
    try:
        text = raw.decode("utf-8-sig")  # -sig: spreadsheet exports often start with a byte-order mark
    except UnicodeDecodeError as e:
        raise QfitError(f"{where}: not UTF-8 text (bad byte at offset {e.start})") from None
    return parse_labels_csv(text, where, data_files, folder, class_names, num_classes, class_order)


def _resolve_inside(path_text: str, where: str, line: int) -> str:
    """A CSV path -> the '/'-separated path relative to the data folder; refuses anything outside it."""
    path = path_text.replace("\\", "/")
    if "\x00" in path:
        raise QfitError(f"{where}: line {line}: file path contains a NUL character")
    if path.startswith("/") or (len(path) > 1 and path[0].isalpha() and path[1] == ":"):
        raise QfitError(f"{where}: line {line}: '{path_text}' is an absolute path; paths are relative to the "
                        f"data folder")
    normal = posixpath.normpath(path)
    if normal == ".." or normal.startswith("../"):
        raise QfitError(f"{where}: line {line}: '{path_text}' points outside the data folder; refused")
    return normal


def parse_labels_csv(text: str, where: str, data_files: set[str], folder: str = ".",
                     class_names: list[str] | None = None,
                     num_classes: int | None = None,
                     class_order: list[str] | None = None) -> tuple[list[str], list[int], list[str] | None]:
    """Parse CSV text. Rows are `file,label`; the first row is a header when its first cell is not a
    data file name. Labels are all integer indices, or else class names, whose indices come from
    `class_order` (the model's output order) or else `class_names` (the sorted class subfolders).
    Names with neither are refused: sorting them would guess an order the model may not have."""
    try:
        rows = [(reader_line, row) for reader_line, row in _csv_rows(text)]
    except csv.Error as e:
        raise QfitError(f"{where}: not a readable CSV ({e})") from None
    rows = [(line, [cell.strip() for cell in row]) for line, row in rows if any(cell.strip() for cell in row)]
    if rows and not _is_data_file(rows[0][1][0]):
        rows = rows[1:]  # header row such as "file,label"
    if not rows:
        raise QfitError(f"{where}: no `file,label` rows")

    entries: list[tuple[int, str, str]] = []
    seen: dict[str, int] = {}
    for line, row in rows:
        if len(row) != 2:
            raise QfitError(f"{where}: line {line}: expected 2 fields `file,label`, found {len(row)}")
        path_text, label_text = row
        if not path_text or not label_text:
            raise QfitError(f"{where}: line {line}: empty {'file' if not path_text else 'label'}")
        rel = _resolve_inside(path_text, where, line)
        if rel not in data_files:
            reason = "not an image or .npy/.npz file" if not _is_data_file(rel) else "no such file"
            raise QfitError(f"{where}: line {line}: '{path_text}': {reason} in {folder}")
        if rel in seen:
            raise QfitError(f"{where}: line {line}: '{path_text}' is listed again (first on line {seen[rel]})")
        seen[rel] = line
        entries.append((line, rel, label_text))

    all_integers = all(_parse_index(label) is not None for _, _, label in entries)
    if all_integers:
        # Integers are the indices themselves. Subfolders need not be classes then (a folder split by
        # day, say), so they neither bound the indices nor name them.
        names = list(class_order) if class_order is not None else None
        limit = num_classes if class_order is None else len(class_order)
        labels = {}
        for line, rel, label_text in entries:
            index = _parse_index(label_text)
            if index > MAX_CLASS_INDEX:  # labels are stored as int64; no classifier has this many classes
                raise QfitError(f"{where}: line {line}: class index {label_text[:40]} is too large")
            if index < 0 or (limit is not None and index >= limit):
                raise QfitError(f"{where}: line {line}: unknown class {label_text} (expected 0..{limit - 1})"
                                if limit is not None else f"{where}: line {line}: negative class index {label_text}")
            labels[rel] = index
    else:
        names = class_order if class_order is not None else class_names
        if not names:
            example = next(label for _, _, label in entries if _parse_index(label) is None)
            raise QfitError(f"{where}: labels are class names (e.g. '{example[:40]}') but the order of the "
                            f"model's outputs is not known; give it with --class-order (names separated by "
                            f"commas, or a file with one name per line)")
        class_index = {name: i for i, name in enumerate(names)}
        labels = {}
        for line, rel, label_text in entries:
            if label_text not in class_index:
                raise QfitError(f"{where}: line {line}: unknown class '{label_text}' "
                                f"(classes: {', '.join(names[:10])}{', ...' if len(names) > 10 else ''})")
            labels[rel] = class_index[label_text]
        if num_classes is not None and len(names) > num_classes:
            raise QfitError(f"{where}: names {len(names)} classes but the model has {num_classes}")
    files = sorted(labels)
    return files, [labels[f] for f in files], names


def _csv_rows(text: str):
    reader = csv.reader(io.StringIO(text, newline=""))
    for row in reader:
        yield reader.line_num, row


def _parse_index(text: str) -> int | None:
    # Only plain decimal digits: int() would also take "٣" (Arabic-Indic three) or "1_000".
    if text.isascii() and (text.isdigit() or (text.startswith("-") and text[1:].isdigit())):
        if len(text.lstrip("-0")) > len(str(MAX_CLASS_INDEX)):
            return MAX_CLASS_INDEX + 1 if not text.startswith("-") else -1  # int() refuses 4300+ digits
        return int(text)
    return None


def _shape_text(shape) -> str:
    return "(" + ", ".join(str(d) for d in shape) + ")"


def _first_line(error: Exception) -> str:
    text = str(error).strip() or type(error).__name__
    return text.splitlines()[0]
