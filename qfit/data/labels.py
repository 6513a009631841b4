"""Labels for the samples of a folder: a `file,label` CSV, or the class subfolders; and the class order
(the order of the model's outputs) that turns class names into indices."""
from __future__ import annotations

import csv
import io
import os
import posixpath

from qfit.data.samples import is_data_file
from qfit.errors import QfitError
from qfit.files import MAX_SMALL_FILE_BYTES, read_regular_file

MAX_CLASS_INDEX = 2 ** 31 - 1


# ------------------------------------------------------------------------------------ class order

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


def _names_text(names: list[str]) -> str:
    """The first ten class names, for a message."""
    return f"{', '.join(names[:10])}{', ...' if len(names) > 10 else ''}"


# ------------------------------------------------------------------------------------ subfolders

def labels_from_subfolders(files: list[str], top_dirs: list[str], class_order: list[str] | None,
                           num_classes: int | None, role: str, folder: str) -> tuple[list[int], list[str]]:
    """Every sample sits in a top-level subfolder: those are the classes -> (labels, class names).
    Empty subfolders still count, so that indices match the sorted class list the model was trained
    on (the order folder-based training loaders use, common practice) unless the order is given."""
    class_names = list(class_order) if class_order is not None else top_dirs
    unknown = sorted(set(top_dirs) - set(class_names))
    if unknown:
        raise QfitError(f"{role} data: subfolder '{unknown[0]}' of {folder} is not in the class order "
                        f"({_names_text(class_names)})")
    class_index = {name: i for i, name in enumerate(class_names)}
    labels = [class_index[f.split("/", 1)[0]] for f in files]
    if num_classes is not None and len(top_dirs) > num_classes:
        raise QfitError(f"{role} data: {folder} has {len(top_dirs)} class subfolders but the model "
                        f"has {num_classes} classes")
    return labels, class_names


# ------------------------------------------------------------------------------------ labels CSV

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


def parse_labels_csv(text: str, where: str, data_files: set[str], folder: str = ".",
                     class_names: list[str] | None = None,
                     num_classes: int | None = None,
                     class_order: list[str] | None = None) -> tuple[list[str], list[int], list[str] | None]:
    """Parse CSV text. Rows are `file,label`; the first row is a header when its first cell is not a
    data file name. Labels are all integer indices, or else class names, whose indices come from
    `class_order` (the model's output order) or else `class_names` (the sorted class subfolders).
    Names with neither are refused: sorting them would guess an order the model may not have."""
    entries = _csv_entries(text, where, data_files, folder)
    if all(_parse_index(label) is not None for _, _, label in entries):
        # Integers are the indices themselves. Subfolders need not be classes then (a folder split by
        # day, say), so they neither bound the indices nor name them.
        names = list(class_order) if class_order is not None else None
        limit = num_classes if class_order is None else len(class_order)
        labels = _labels_from_indices(entries, where, limit)
    else:
        names = class_order if class_order is not None else class_names
        labels = _labels_from_names(entries, where, names, num_classes)
    files = sorted(labels)
    return files, [labels[f] for f in files], names


def _csv_entries(text: str, where: str, data_files: set[str], folder: str) -> list[tuple[int, str, str]]:
    """The CSV's (line, file relative to the folder, label text) rows, header and blank rows dropped;
    each file exists among `data_files` and is listed once."""
    try:
        rows = [(reader_line, row) for reader_line, row in _csv_rows(text)]
    except csv.Error as e:
        raise QfitError(f"{where}: not a readable CSV ({e})") from None
    rows = [(line, [cell.strip() for cell in row]) for line, row in rows if any(cell.strip() for cell in row)]
    if rows and not is_data_file(rows[0][1][0]):
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
            reason = "not an image or .npy/.npz file" if not is_data_file(rel) else "no such file"
            raise QfitError(f"{where}: line {line}: '{path_text}': {reason} in {folder}")
        if rel in seen:
            raise QfitError(f"{where}: line {line}: '{path_text}' is listed again (first on line {seen[rel]})")
        seen[rel] = line
        entries.append((line, rel, label_text))
    return entries


def _labels_from_indices(entries: list[tuple[int, str, str]], where: str, limit: int | None) -> dict[str, int]:
    """File -> class index for integer labels; `limit` (the class count) bounds them when known."""
    labels = {}
    for line, rel, label_text in entries:
        index = _parse_index(label_text)
        if index > MAX_CLASS_INDEX:  # labels are stored as int64; no classifier has this many classes
            raise QfitError(f"{where}: line {line}: class index {label_text[:40]} is too large")
        if index < 0 or (limit is not None and index >= limit):
            raise QfitError(f"{where}: line {line}: unknown class {label_text} (expected 0..{limit - 1})"
                            if limit is not None else f"{where}: line {line}: negative class index {label_text}")
        labels[rel] = index
    return labels


def _labels_from_names(entries: list[tuple[int, str, str]], where: str, names: list[str] | None,
                       num_classes: int | None) -> dict[str, int]:
    """File -> class index for class-name labels, the index being the name's place in `names`."""
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
                            f"(classes: {_names_text(names)})")
        labels[rel] = class_index[label_text]
    if num_classes is not None and len(names) > num_classes:
        raise QfitError(f"{where}: names {len(names)} classes but the model has {num_classes}")
    return labels


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
