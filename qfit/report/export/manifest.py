"""manifest: the export as one JSON document, for toolchains that do not read C (docs/export.md)."""
from __future__ import annotations

import base64

import numpy as np

from qfit.report.export.c_code import FORMAT_VERSION, LAYOUTS, ROLES, padded_bytes
from qfit.report.export.collect import KINDS, ExportModel, ParamArray

FNV_OFFSET, FNV_PRIME = 2166136261, 16777619
CAUTION = ("Figures hold for the data measured. Validate on held-out data on the real device; this export "
           "does not replace the product's own safety validation.")


def fnv1a32(values: np.ndarray) -> int:
    """32-bit FNV-1a (Fowler, Noll, Vo) over each value's 4-byte little-endian two's complement."""
    data = np.asarray(values, dtype=np.int64).astype("<i4").tobytes()
    h = FNV_OFFSET
    for byte in data:
        h = ((h ^ byte) * FNV_PRIME) & 0xFFFFFFFF
    return h


def little_endian_bytes(array: ParamArray) -> bytes:
    """The array's elements as stored: int8 bytes, or int32 in little-endian byte order."""
    return array.values.astype("<i1" if array.elem_bytes == 1 else "<i4").tobytes()


def _array(array: ParamArray) -> dict:
    return {"name": array.c_name, "role": array.role, "type": array.ctype, "layer": array.layer,
            "shape": array.shape, "count": int(array.values.size), "bytes": array.bytes,
            "checksum_fnv1a32": fnv1a32(array.values), "source": array.source,
            "data_base64": base64.b64encode(little_endian_bytes(array)).decode("ascii")}


def _name_of(array: ParamArray | None) -> str | None:
    return None if array is None else array.c_name


def _layer(layer) -> dict:
    return {"index": layer.index, "name": layer.name, "op_type": layer.op_type, "kind": layer.kind,
            "step": layer.step, "inputs": layer.inputs, "output": layer.output, "kernel": layer.kernel,
            "stride": layer.stride, "pads": layer.pads, "dilation": layer.dilation, "groups": layer.groups,
            "axis": layer.axis, "left_shift": layer.left_shift, "act_min": layer.act_min, "act_max": layer.act_max,
            "fused_activation": layer.fused_activation, "weights": _name_of(layer.weights),
            "bias": _name_of(layer.bias), "multipliers": _name_of(layer.multipliers),
            "shifts": _name_of(layer.shifts), "table": _name_of(layer.table)}


def _tensor(tensor) -> dict:
    return {"index": tensor.index, "name": tensor.name, "shape": tensor.shape, "layout": tensor.layout,
            "dtype": "int8", "bytes": tensor.bytes, "scale": tensor.scale, "zero_point": tensor.zero_point,
            "buffer": tensor.buffer, "arena_offset": tensor.arena_offset, "first_step": tensor.first_step,
            "last_step": tensor.last_step}


def build_manifest(export: ExportModel, model_file: str, prefix: str, alignment: int, files: dict) -> dict:
    arrays = export.arrays()
    return {
        "format": "qfit export", "format_version": FORMAT_VERSION, "model_file": model_file,
        "prefix": prefix, "files": files, "alignment_bytes": alignment,
        "arena": {"bytes": export.arena_bytes, "alignment_bytes": export.arena_alignment_bytes,
                  "order_method": export.order_method},
        "flash": {"param_bytes": sum(a.bytes for a in arrays),
                  "param_bytes_aligned": sum(padded_bytes(a.bytes, alignment) for a in arrays),
                  "report_param_bytes": export.report_param_bytes},
        "codes": {"kind": {k: i + 1 for i, k in enumerate(KINDS)},
                  "layout": {k: i + 1 for i, k in enumerate(LAYOUTS)},
                  "role": {k: i + 1 for i, k in enumerate(ROLES)}},
        "inputs": export.input_tensors, "outputs": export.output_tensors,
        "tensors": [_tensor(t) for t in export.tensors],
        "layers": [_layer(layer) for layer in export.layers],
        "arrays": [_array(a) for a in arrays],
        "caution": CAUTION,
    }
