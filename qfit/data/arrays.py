""".npy/.npz sample files -> model inputs: header checks without reading the data, refusal of pickled
objects, and the mapping of .npz keys to model input names. Arrays are fed as they are (cast to float32)."""
from __future__ import annotations

import zipfile

import numpy as np

from qfit.data.samples import DECODE_ERRORS, SkippableError, extension_of, first_line, shape_text
from qfit.errors import QfitError

_NPY_MAGIC = b"\x93NUMPY"
_PICKLE_PROTOCOL_BYTE = 0x80  # first byte of a pickle stream, protocol 2 and newer
_NUMERIC_KINDS = "biuf"  # bool, signed, unsigned, float; complex would lose its imaginary part


class _PickledError(Exception):
    pass


def check_array_header(path: str, where: str, input_shapes: dict[str, tuple[int, ...]]) -> None:
    """Shapes and dtypes from the headers of a .npy or every array of a .npz; `where` names the file."""
    if extension_of(path) == ".npy":
        try:
            with open(path, "rb") as f:
                shape, dtype = _read_npy_header(f)
        except _PickledError:
            raise QfitError(f"{where}: contains pickled objects; refused") from None
        except DECODE_ERRORS as e:
            raise SkippableError(f"cannot read .npy ({first_line(e)})") from None
        name = next(iter(_array_targets(where, list(input_shapes), None)))
        _check_shape_dtype(where, "array", name, shape, dtype, input_shapes[name])
        return
    try:
        with zipfile.ZipFile(path) as archive:
            headers = {}
            for key, member in _npz_members(archive).items():
                with archive.open(member) as f:
                    headers[key] = _read_npy_header(f)
    except _PickledError:
        raise QfitError(f"{where}: contains pickled objects; refused") from None
    except DECODE_ERRORS as e:
        raise SkippableError(f"cannot read .npz ({first_line(e)})") from None
    if not headers:
        raise SkippableError("cannot read .npz (it holds no arrays)")
    for name, key in _array_targets(where, list(input_shapes), sorted(headers)).items():
        shape, dtype = headers[key]
        _check_shape_dtype(where, f"key '{key}'", name, shape, dtype, input_shapes[name])


def read_arrays(path: str, where: str, input_shapes: dict[str, tuple[int, ...]]) -> dict[str, np.ndarray]:
    """One .npy/.npz sample -> model input name -> float32 array with a batch dimension of 1."""
    names = list(input_shapes)
    try:
        if extension_of(path) == ".npy":
            targets = _array_targets(where, names, None)
            loaded = {None: np.load(path, allow_pickle=False)}
        else:
            with zipfile.ZipFile(path) as archive:
                members = _npz_members(archive)
                targets = _array_targets(where, names, sorted(members))
                loaded = {}
                for key in targets.values():
                    with archive.open(members[key]) as f:
                        loaded[key] = np.lib.format.read_array(f, allow_pickle=False)
    except QfitError:
        raise
    except DECODE_ERRORS as e:
        if isinstance(e, ValueError) and "pickle" in str(e).lower():
            raise QfitError(f"{where}: contains pickled objects; refused") from None
        raise SkippableError(f"cannot read array file ({first_line(e)})") from None
    sample = {}
    for name, key in targets.items():
        array = loaded[key]
        what = "array" if key is None else f"key '{key}'"
        _check_shape_dtype(where, what, name, array.shape, array.dtype, input_shapes[name])
        with np.errstate(over="ignore", invalid="ignore"):  # overflow to Inf is reported just below
            values = np.asarray(array, dtype=np.float32).reshape((1,) + tuple(input_shapes[name][1:]))
        if not np.isfinite(values).all():
            bad = "NaN" if np.isnan(values).any() else "Inf"
            raise QfitError(f"{where}: {what} contains {bad} (after conversion to float32)")
        sample[name] = values
    return sample


def _array_targets(where: str, names: list[str], keys: list[str] | None) -> dict[str, str | None]:
    """Model input name -> .npz key (None for a .npy), or raise naming what does not line up."""
    if keys is None:
        if len(names) != 1:
            raise QfitError(f"{where}: a .npy holds one array but the model has {len(names)} inputs "
                            f"({', '.join(names)}); use .npz files keyed by input name")
        return {names[0]: None}
    if len(names) == 1 and len(keys) == 1:
        return {names[0]: keys[0]}
    if len(names) == 1 and names[0] in keys and len(keys) > 1:
        extra = sorted(set(keys) - set(names))
        raise QfitError(f"{where}: keys {', '.join(extra)} are not model inputs "
                        f"(the model's only input is '{names[0]}')")
    missing = [n for n in names if n not in keys]
    extra = sorted(set(keys) - set(names))
    if missing or extra:
        parts = []
        if missing:
            parts.append(f"no key for input(s) {', '.join(missing)}")
        if extra:
            parts.append(f"keys {', '.join(extra)} are not model inputs")
        raise QfitError(f"{where}: {'; '.join(parts)} (model inputs: {', '.join(names)})")
    return {n: n for n in names}


def _check_shape_dtype(where: str, what: str, name: str, shape: tuple, dtype: np.dtype,
                       expected: tuple[int, ...]) -> None:
    sample = (1,) + tuple(expected[1:])
    if dtype.hasobject:
        raise QfitError(f"{where}: {what} contains pickled objects; refused")
    if dtype.kind not in _NUMERIC_KINDS:
        raise QfitError(f"{where}: {what} has dtype {dtype}, expected a numeric dtype "
                        f"(it is cast to float32) for input '{name}'")
    if tuple(shape) not in (sample, sample[1:]):
        stack_note = ""
        if len(shape) == len(sample) and tuple(shape[1:]) == sample[1:]:
            stack_note = f"; it stacks {shape[0]} samples, but each file must hold one sample"
        raise QfitError(f"{where}: {what} has shape {shape_text(shape)}, expected "
                        f"{shape_text(sample)} or {shape_text(sample[1:])} for input '{name}'{stack_note}")


# ------------------------------------------------------------------------------------ .npy headers

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
