"""Images -> model inputs: the preprocessing settings (Preprocess, read from JSON or built in code) and
Pillow decoding, resizing and normalisation of one image file."""
from __future__ import annotations

import json
import math
from dataclasses import dataclass, fields

import numpy as np
from PIL import Image

from qfit.data.samples import DECODE_ERRORS, SkippableError, first_line, shape_text
from qfit.errors import QfitError
from qfit.files import MAX_SMALL_FILE_BYTES, read_regular_file

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


# ------------------------------------------------------------------------------------ one image

@dataclass(frozen=True)
class ImagePlan:
    """The model's single image input: its name, the H, W it wants, and the normalisation arrays."""
    name: str
    hw: tuple[int, int]
    mean: np.ndarray
    std: np.ndarray


def plan_images(role: str, folder: str, input_shapes: dict[str, tuple[int, ...]],
                preprocess: Preprocess) -> ImagePlan:
    """Where the model's single image input wants channels, its H, W, and the channel count."""
    if len(input_shapes) != 1:
        raise QfitError(f"{role} data: {folder} holds images but the model has "
                        f"{len(input_shapes)} inputs ({', '.join(input_shapes)}); "
                        f"images feed single-input models only, use .npz files keyed by input name")
    name, shape = next(iter(input_shapes.items()))
    p = preprocess
    if len(shape) != 4:
        raise QfitError(f"{role} data: images need a 4-D model input (batch, channels, H, W), but "
                        f"input '{name}' has shape {shape_text(shape)}")
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
        raise QfitError(f"{role} data: model input '{name}' {shape_text(shape)} has {model_channels} "
                        f"channels in layout {p.layout}, color {p.color} gives {color_channels}{hint}")
    for key, values in (("mean", p.mean), ("std", p.std)):
        if len(values) not in (1, color_channels):
            raise QfitError(f"preprocess: {key} has {len(values)} values; expected 1 or {color_channels} "
                            f"(one per channel for color {p.color})")
    model_hw = (shape[2], shape[3]) if p.layout == "NCHW" else (shape[1], shape[2])
    if p.size is not None and p.size != model_hw:
        raise QfitError(f"preprocess: size {p.size[0]}x{p.size[1]} (HxW) does not match model input "
                        f"'{name}' {shape_text(shape)}, which wants {model_hw[0]}x{model_hw[1]}")
    return ImagePlan(name=name, hw=model_hw,
                     mean=np.asarray(p.mean, dtype=np.float32), std=np.asarray(p.std, dtype=np.float32))


def check_image_header(path: str, where: str, preprocess: Preprocess, plan: ImagePlan) -> None:
    """Mode and size from the header; `where` names the file in messages."""
    try:
        with Image.open(path) as img:
            mode, (width, height) = img.mode, img.size
            img.verify()  # checks the file's structure (e.g. PNG chunk CRCs) without decoding pixels
    except DECODE_ERRORS as e:
        raise SkippableError(f"cannot read image ({first_line(e)})") from None
    _check_mode_and_size(where, mode, (height, width), preprocess, plan)


def _check_mode_and_size(where: str, mode: str, image_hw: tuple[int, int], preprocess: Preprocess,
                         plan: ImagePlan) -> None:
    if mode.startswith(_WIDE_PIXEL_MODES):
        raise QfitError(f"{where}: image mode {mode} has more than 8 bits per channel; "
                        f"convert it to 8-bit or save the sample as .npy")
    if preprocess.size is None and image_hw != plan.hw:
        raise QfitError(f"{where}: image is {image_hw[0]}x{image_hw[1]} (HxW) but the model input "
                        f"'{plan.name}' wants {plan.hw[0]}x{plan.hw[1]}; images of mixed sizes or "
                        f"of another size need resizing: set a target size")


def read_image(path: str, where: str, preprocess: Preprocess, plan: ImagePlan) -> np.ndarray:
    """One image file -> a float32 (1, ...) array in the model's layout."""
    p = preprocess
    try:
        with Image.open(path) as img:
            img.load()
            _check_mode_and_size(where, img.mode, (img.size[1], img.size[0]), p, plan)
            img = img.convert("L" if p.color == "L" else "RGB")
            height, width = plan.hw
            if img.size != (width, height):
                img = img.resize((width, height), resample=_PILLOW_FILTER[p.resize])
            pixels = np.asarray(img, dtype=np.float32)
    except QfitError:
        raise
    except DECODE_ERRORS as e:
        raise SkippableError(f"cannot read image ({first_line(e)})") from None
    if pixels.ndim == 2:
        pixels = pixels[:, :, None]
    if p.color == "BGR":
        pixels = pixels[:, :, ::-1]
    with np.errstate(over="ignore", invalid="ignore"):  # overflow to Inf is reported just below
        values = (pixels * np.float32(p.scale) - plan.mean) / plan.std
    if p.layout == "NCHW":
        values = values.transpose(2, 0, 1)
    values = np.ascontiguousarray(values[None], dtype=np.float32)
    if not np.isfinite(values).all():  # only reachable with extreme scale/mean/std values
        raise QfitError(f"{where}: preprocessing gives NaN or Inf; check scale, mean and std")
    return values
