"""c_code: the export's data as a C99 header/source pair (format described in docs/export.md).

Nothing taken from the model is pasted into C as it is: names become string literals in which every
byte outside printable ASCII, and every quote, backslash and question mark (C99 trigraphs, 5.2.1.1),
is an octal escape or a backslash escape, cut to MAX_NAME_BYTES (C99 5.2.4.1 only guarantees 4095
characters per literal); identifiers are built from the layer index and the letters, digits and
underscores of the node name, so they are valid, unique and never reserved (no leading underscore,
no double underscore). Comments hold only generated identifiers, never a model's name.
"""
from __future__ import annotations

import re

import numpy as np

from qfit.report.export.collect import KINDS, MAX_RANK, ExportModel, ParamArray

FORMAT_VERSION = 1
MAX_NAME_BYTES = 200
MAX_IDENTIFIER_CHARS = 63      # C99 5.2.4.1: significant initial characters of an internal identifier
MAX_PREFIX_CHARS = 24
ROLES = ("weights", "bias", "multipliers", "shifts", "table")
ROLE_SUFFIX = {"weights": "w", "bias": "b", "multipliers": "m", "shifts": "s", "table": "t"}
LAYOUTS = ("NCHW", "ND")
VALUES_PER_LINE = 20
INT32_MIN = -(1 << 31)


def valid_prefix(prefix: str) -> bool:
    return bool(re.fullmatch(r"[A-Za-z][A-Za-z0-9]*(_[A-Za-z0-9]+)*", prefix)) and len(prefix) <= MAX_PREFIX_CHARS


def c_string(text: str, max_bytes: int = MAX_NAME_BYTES) -> str:
    """A C99 string literal holding the UTF-8 bytes of `text` (cut at a character boundary)."""
    data = text.encode("utf-8")
    if len(data) > max_bytes:
        data = data[:max_bytes].decode("utf-8", "ignore").encode("utf-8") + b"..."
    out = []
    for byte in data:
        ch = chr(byte)
        if ch in '"\\?':
            out.append("\\" + ch)
        elif 0x20 <= byte < 0x7F:
            out.append(ch)
        else:
            out.append(f"\\{byte:03o}")   # always 3 digits: a following digit cannot join the escape
    return '"' + "".join(out) + '"'


def identifier_stem(name: str) -> str:
    """Letters, digits and single underscores of `name`, lower case ("" when nothing is left)."""
    return re.sub(r"_+", "_", re.sub(r"[^A-Za-z0-9]", "_", name.encode("ascii", "replace").decode())).strip("_").lower()


def array_identifier(prefix: str, layer_index: int, layer_name: str, role: str) -> str:
    """`<prefix>_l<index>_<stem>_<role letter>`: unique through the index, at most 63 characters."""
    head, tail = f"{prefix}_l{layer_index}", f"_{ROLE_SUFFIX[role]}"
    stem = identifier_stem(layer_name)[:MAX_IDENTIFIER_CHARS - len(head) - len(tail) - 1].strip("_")
    return head + (f"_{stem}" if stem else "") + tail


def assign_names(export: ExportModel, prefix: str) -> None:
    used: set[str] = set()
    for layer in export.layers:
        for array in layer.arrays():
            array.c_name = array_identifier(prefix, layer.index, layer.name, array.role)
            if array.c_name in used:
                raise RuntimeError(f"export: identifier {array.c_name} made twice")
            used.add(array.c_name)


def c_float(value: float) -> str:
    """A float literal that reads back as the same float32 (9 significant digits suffice)."""
    text = format(float(np.float32(value)), ".9g")
    if not any(c in text for c in ".e"):
        text += ".0"
    return text + "f"


def c_int(value: int) -> str:
    return "(-2147483647 - 1)" if value == INT32_MIN else str(int(value))


def padded_bytes(nbytes: int, alignment: int) -> int:
    return -(-nbytes // alignment) * alignment


def _header_defines(export: ExportModel, prefix: str, alignment: int) -> list[str]:
    p = prefix.upper()
    arrays = export.arrays()
    lines = [
        f"#define {p}_FORMAT_VERSION {FORMAT_VERSION}",
        f"#define {p}_ARENA_BYTES {export.arena_bytes}u  /* tensors placed at the offsets below */",
        f"#define {p}_ARENA_ALIGNMENT {export.arena_alignment_bytes}u",
        f"#define {p}_FLASH_BYTES {sum(a.bytes for a in arrays)}u  /* parameter arrays, without padding */",
        f"#define {p}_FLASH_BYTES_ALIGNED {sum(padded_bytes(a.bytes, alignment) for a in arrays)}u"
        f"  /* each array padded to {p}_ALIGNMENT */",
        f"#define {p}_ALIGNMENT {alignment}",
        f"#define {p}_LAYER_COUNT {len(export.layers)}u",
        f"#define {p}_TENSOR_COUNT {len(export.tensors)}u",
        f"#define {p}_ARRAY_COUNT {len(arrays)}u",
        f"#define {p}_LAYER_INPUT_COUNT {sum(len(layer.inputs) for layer in export.layers)}u",
        f"#define {p}_INPUT_COUNT {len(export.input_tensors)}u",
        f"#define {p}_OUTPUT_COUNT {len(export.output_tensors)}u",
        f"#define {p}_MAX_RANK {MAX_RANK}",
        "",
        "/* layer kinds (qmodel_layer.kind) */",
    ]
    lines += [f"#define {p}_KIND_{kind} {i + 1}" for i, kind in enumerate(KINDS)]
    lines += ["", "/* tensor layouts (tensor.layout) */"]
    lines += [f"#define {p}_LAYOUT_{layout} {i + 1}" for i, layout in enumerate(LAYOUTS)]
    lines += ["", "/* array roles (array.role) */"]
    lines += [f"#define {p}_ROLE_{role.upper()} {i + 1}" for i, role in enumerate(ROLES)]
    return [line.replace("qmodel_", f"{prefix}_") for line in lines]


_TYPES = """typedef struct {
    const char *name;           /* tensor name from the model (escaped, cut at 200 bytes) */
    uint32_t arena_offset;      /* bytes from the start of the arena */
    uint32_t bytes;             /* int8 elements = bytes */
    uint32_t buffer;            /* arena slot; tensors of one slot share bytes (view, in place) */
    int32_t first_step;         /* lifetime in the execution order (layer.step), inclusive */
    int32_t last_step;
    uint8_t rank;
    uint8_t layout;             /* QMODEL_LAYOUT_* */
    uint32_t shape[QMODEL_MAX_RANK];  /* unused entries are 0 */
    float scale;                /* real = scale * (q - zero_point) */
    int32_t zero_point;
} qmodel_tensor;

typedef struct {
    const char *name;           /* node name from the model (escaped, cut at 200 bytes) */
    uint8_t kind;               /* QMODEL_KIND_* */
    uint32_t step;              /* position in the execution order of the memory plan */
    uint32_t input_first;       /* first entry in qmodel_layer_inputs */
    uint32_t input_count;
    uint32_t output;            /* tensor index */
    uint32_t kernel[2];         /* height, width */
    uint32_t stride[2];
    uint32_t pad[4];            /* top, left, bottom, right */
    uint32_t dilation[2];
    uint32_t groups;
    uint32_t axis;              /* CONCAT: joined axis */
    uint32_t left_shift;        /* ADD: (q - zero_point) << left_shift before the input multipliers */
    int8_t act_min;             /* output clamp, int8 (fused ReLU/ReLU6 bounds) */
    int8_t act_max;
    const int8_t *weights;      /* CONV: [out][in/groups][kh][kw]; FULLY_CONNECTED: [out][in] */
    uint32_t weight_count;
    uint32_t weight_shape[4];   /* unused entries are 0 */
    const int32_t *bias;        /* [out], scale = input scale x weight scale, or NULL */
    uint32_t bias_count;
    const int32_t *multipliers; /* real factor = multiplier * 2^(shift - 31), or NULL */
    const int8_t *shifts;
    uint32_t requant_count;     /* see docs/export.md: per output channel, per input, or per position */
    const int8_t *table;        /* CLAMP: 256 entries, output for input q at table[q + 128], or NULL */
} qmodel_layer;

typedef struct {
    const char *name;           /* the array's identifier */
    uint8_t role;               /* QMODEL_ROLE_* */
    uint8_t elem_bytes;
    uint32_t layer;
    const void *data;
    uint32_t count;             /* elements, from sizeof of the definition */
} qmodel_array;
"""


def render_header(export: ExportModel, prefix: str, alignment: int) -> str:
    guard = f"{prefix.upper()}_H"
    types = _TYPES.replace("QMODEL_", f"{prefix.upper()}_").replace("qmodel_", f"{prefix}_")
    externs = [f"extern const {prefix}_tensor {prefix}_tensors[{prefix.upper()}_TENSOR_COUNT];",
               f"extern const {prefix}_layer {prefix}_layers[{prefix.upper()}_LAYER_COUNT];",
               f"extern const uint32_t {prefix}_layer_inputs[{prefix.upper()}_LAYER_INPUT_COUNT];",
               f"extern const uint32_t {prefix}_input_tensors[{prefix.upper()}_INPUT_COUNT];",
               f"extern const uint32_t {prefix}_output_tensors[{prefix.upper()}_OUTPUT_COUNT];"]
    if export.arrays():
        externs.append(f"extern const {prefix}_array {prefix}_arrays[{prefix.upper()}_ARRAY_COUNT];")
    return "\n".join([
        "/* Generated by qfit export: an int8 model as data and memory plan (no kernels).",
        f" * Format version {FORMAT_VERSION}, described field by field in qfit's docs/export.md. */",
        f"#ifndef {guard}", f"#define {guard}", "", "#include <stdint.h>", "",
        *_header_defines(export, prefix, alignment), "", types, *externs, "", f"#endif /* {guard} */", ""])


def _array_definition(array: ParamArray, prefix: str) -> list[str]:
    values = [c_int(v) for v in array.values.tolist()]
    rows = [", ".join(values[i:i + VALUES_PER_LINE]) for i in range(0, len(values), VALUES_PER_LINE)]
    shape = "x".join(str(d) for d in array.shape)
    return [f"/* {array.role} of layer {array.layer}, {shape} */",
            f"static const {array.ctype} {array.c_name}[] {prefix.upper()}_ALIGNED = {{",
            *("    " + row + "," for row in rows), "};", ""]


def _dims(values: list[int], length: int) -> str:
    return "{" + ", ".join(str(int(v)) for v in list(values) + [0] * (length - len(values))) + "}"


def _pointer_and_count(array: ParamArray | None, prefix: str) -> str:
    if array is None:
        return "NULL, 0u"
    return f"{array.c_name}, (uint32_t){prefix.upper()}_COUNT({array.c_name})"


def _layer_entry(layer, input_first: int, prefix: str) -> str:
    p = prefix.upper()
    weights = _pointer_and_count(layer.weights, prefix)
    requant = (f"{layer.multipliers.c_name}, {layer.shifts.c_name}, (uint32_t){p}_COUNT({layer.multipliers.c_name})"
               if layer.multipliers is not None else "NULL, NULL, 0u")
    return (f"    {{ /* layer {layer.index} */ {c_string(layer.name)}, {p}_KIND_{layer.kind}, {layer.step}u, "
            f"{input_first}u, {len(layer.inputs)}u, {layer.output}u,\n"
            f"      {_dims(layer.kernel, 2)}, {_dims(layer.stride, 2)}, {_dims(layer.pads, 4)}, "
            f"{_dims(layer.dilation, 2)}, {layer.groups}u, {layer.axis}u, {layer.left_shift}u, {layer.act_min}, "
            f"{layer.act_max},\n"
            f"      {weights}, {_dims(layer.weights.shape if layer.weights else [], 4)},\n"
            f"      {_pointer_and_count(layer.bias, prefix)}, {requant},\n"
            f"      {layer.table.c_name if layer.table is not None else 'NULL'} }},")


def _tensor_entry(tensor, prefix: str) -> str:
    return (f"    {{ /* tensor {tensor.index} */ {c_string(tensor.name)}, {tensor.arena_offset}u, {tensor.bytes}u, "
            f"{tensor.buffer}u, {tensor.first_step}, {tensor.last_step}, {len(tensor.shape)}u, "
            f"{prefix.upper()}_LAYOUT_{tensor.layout}, {_dims(tensor.shape, MAX_RANK)}, {c_float(tensor.scale)}, "
            f"{tensor.zero_point} }},")


def _index_list(values: list[int]) -> str:
    return ", ".join(f"{v}u" for v in values)


def render_source(export: ExportModel, prefix: str, header_name: str) -> str:
    """The .c file: parameter arrays (static, aligned), then the tables that point at them."""
    p = prefix.upper()
    lines = ["/* Generated by qfit export (see the header). */", f'#include "{header_name}"', "",
             "#include <stddef.h>", "",
             f"#ifndef {p}_ALIGNED",
             "#if defined(__GNUC__)",
             f"#define {p}_ALIGNED __attribute__((aligned({p}_ALIGNMENT)))",
             "#else",
             f"#define {p}_ALIGNED  /* define {p}_ALIGNED for your compiler to align arrays */",
             "#endif", "#endif",
             f"#define {p}_COUNT(a) (sizeof (a) / sizeof (a)[0])", ""]
    for array in export.arrays():
        lines += _array_definition(array, prefix)
    inputs, firsts = [], []
    for layer in export.layers:
        firsts.append(len(inputs))
        inputs += layer.inputs
    lines += [f"const uint32_t {prefix}_layer_inputs[{p}_LAYER_INPUT_COUNT] = {{ {_index_list(inputs)} }};",
              f"const uint32_t {prefix}_input_tensors[{p}_INPUT_COUNT] = {{ {_index_list(export.input_tensors)} }};",
              f"const uint32_t {prefix}_output_tensors[{p}_OUTPUT_COUNT] = {{ {_index_list(export.output_tensors)} }};",
              "", f"const {prefix}_tensor {prefix}_tensors[{p}_TENSOR_COUNT] = {{"]
    lines += [_tensor_entry(t, prefix) for t in export.tensors]
    lines += ["};", "", f"const {prefix}_layer {prefix}_layers[{p}_LAYER_COUNT] = {{"]
    lines += [_layer_entry(layer, first, prefix) for layer, first in zip(export.layers, firsts)]
    lines += ["};", ""]
    if export.arrays():
        lines.append(f"const {prefix}_array {prefix}_arrays[{p}_ARRAY_COUNT] = {{")
        for array in export.arrays():
            lines.append(f'    {{ "{array.c_name}", {p}_ROLE_{array.role.upper()}, {array.elem_bytes}u, '
                         f'{array.layer}u, '
                         f"{array.c_name}, (uint32_t){p}_COUNT({array.c_name}) }},")
        lines += ["};", ""]
    return "\n".join(lines)
