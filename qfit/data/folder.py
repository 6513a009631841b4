"""A calibration / evaluation folder: its sample files, their labels, the `limit` sample, and batches
streamed from them (images through images.py, arrays through arrays.py)."""
from __future__ import annotations

import copy
import os
import posixpath
from dataclasses import dataclass
from typing import Iterator

import numpy as np

from qfit.data.arrays import check_array_header, read_arrays
from qfit.data.images import Preprocess, check_image_header, check_preprocess, plan_images, read_image
from qfit.data.labels import check_class_order, labels_from_subfolders, read_labels_csv
from qfit.data.samples import (ARRAY_EXTENSIONS, IMAGE_EXTENSIONS, SkippableError, extension_of,
                               is_data_file, shape_text)
from qfit.errors import QfitError
from qfit.files import NOT_REGULAR_REASON, split_regular


def seeded_choice(count: int, limit: int, seed: int) -> np.ndarray:
    """`limit` of `count` indices, drawn with `seed` and sorted (the files keep their order)."""
    return np.sort(np.random.default_rng(seed).choice(count, size=limit, replace=False))


@dataclass
class Batch:
    inputs: dict[str, np.ndarray]   # input name -> float32 array with leading batch dim B
    labels: np.ndarray | None       # int64 (B,) or None
    files: list[str]                # relative paths of the samples, in order


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
            (data_files if is_data_file(name) else other_files).append(rel)
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
        self._check_input_shapes()
        data_files, top_dirs = self._list_data_files()
        files, labels = self._attach_labels(data_files, top_dirs, labels_csv, num_classes, class_order)

        self.kind = self._kind_of(files)
        if self.kind == "arrays" and preprocess is not None:
            raise QfitError(f"{role} data: {folder} holds .npy/.npz arrays, which are fed to the model as they "
                            f"are; preprocessing options (--preprocess, --size, --color, --layout, --scale, "
                            f"--mean, --std) apply to images only: drop them or preprocess the arrays")
        if self.kind == "images":
            self._image_plan = plan_images(role, folder, self.input_shapes, self.preprocess)

        files, labels = self._choose(files, labels, limit, seed)
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
            except SkippableError as e:
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

    def sample(self, limit: int | None, seed: int) -> "DataFolder":
        """At most `limit` of this folder's samples, chosen as `limit` chooses them when a folder is
        opened (seeded, kept in order), without listing and checking the folder again."""
        if limit is None or limit >= len(self.files):
            return self
        chosen = seeded_choice(len(self.files), limit, seed)
        subset = copy.copy(self)
        subset.files = [self.files[i] for i in chosen]
        subset.labels = None if self.labels is None else self.labels[chosen]
        subset.skipped = []   # a file the subset skips late is also skipped (and counted) by the whole folder
        return subset

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

    # -------------------------------------------------------------------------------- construction

    def _check_input_shapes(self) -> None:
        if not self.input_shapes:
            raise QfitError(f"{self.role} data: the model has no inputs to feed")
        for name, shape in self.input_shapes.items():
            if not shape or any(d <= 0 for d in shape):
                raise QfitError(f"{self.role} data: model input '{name}' has shape {shape_text(shape)}; every "
                                f"dimension must be a fixed positive size (set it with --input-shape)")

    def _list_data_files(self) -> tuple[list[str], list[str]]:
        """(the folder's regular data files, its top-level subfolders); others are skipped or refused."""
        role, folder = self.role, self.folder
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
        return data_files, top_dirs

    def _attach_labels(self, data_files: list[str], top_dirs: list[str], labels_csv: str | None,
                       num_classes: int | None, class_order: list[str] | None) -> tuple[list[str], list[int] | None]:
        """(files, their labels or None) from the CSV, else from class subfolders; sets the label fields."""
        files, labels = data_files, None
        order_source = "given" if class_order is not None else "subfolder names, sorted"
        if labels_csv is not None:
            subfolder_classes = top_dirs if all("/" in f for f in data_files) else None
            files, labels, self.class_names = read_labels_csv(
                labels_csv, set(data_files), self.folder, subfolder_classes, num_classes, class_order)
            self.label_source = "csv"
            if self.class_names is not None:
                self.class_order_source = order_source
        elif top_dirs and all("/" in f for f in data_files):
            labels, self.class_names = labels_from_subfolders(
                files, top_dirs, class_order, num_classes, self.role, self.folder)
            self.class_order_source = order_source
            self.label_source = "subfolders"
        return files, labels

    def _choose(self, files: list[str], labels: list[int] | None, limit: int | None,
                seed: int) -> tuple[list[str], list[int] | None]:
        """A seeded sample of `limit` files (kept in order), or all of them."""
        if limit is None:
            return files, labels
        if not isinstance(limit, (int, np.integer)) or isinstance(limit, bool) or limit <= 0:
            raise QfitError(f"{self.role} data: limit must be a positive number of samples, got {limit}")
        if limit < len(files):
            chosen = seeded_choice(len(files), limit, seed)
            files = [files[i] for i in chosen]
            labels = None if labels is None else [labels[i] for i in chosen]
        return files, labels

    def _kind_of(self, files: list[str]) -> str:
        images = [f for f in files if extension_of(f) in IMAGE_EXTENSIONS]
        arrays = [f for f in files if extension_of(f) in ARRAY_EXTENSIONS]
        if images and arrays:
            raise QfitError(f"{self.role} data: {self.folder} mixes images and arrays (e.g. {images[0]} and "
                            f"{arrays[0]}); use one kind per folder")
        return "images" if images else "arrays"

    def _check_headers(self) -> None:
        """Cheap per-file checks at construction, so that shape errors and unreadable headers surface
        before any model runs. Full decoding happens in batches()."""
        good = []
        for rel in self.files:
            path, where = os.path.join(self.folder, rel), self._where(rel)
            try:
                if self.kind == "images":
                    check_image_header(path, where, self.preprocess, self._image_plan)
                else:
                    check_array_header(path, where, self.input_shapes)
            except SkippableError as e:
                if not self.skip_bad:
                    raise QfitError(f"{where}: {e} (pass skip_bad / --skip-bad to skip bad files)") from None
                self.skipped.append((rel, str(e)))
                continue
            good.append(rel)
        self._drop_files(set(self.files) - set(good))

    # -------------------------------------------------------------------------------- streaming

    def _where(self, rel: str) -> str:
        return f"{self.role} data: {os.path.join(self.folder, rel)}"

    def _read_sample(self, rel: str) -> dict[str, np.ndarray]:
        path, where = os.path.join(self.folder, rel), self._where(rel)
        if self.kind == "images":
            return {self._image_plan.name: read_image(path, where, self.preprocess, self._image_plan)}
        return read_arrays(path, where, self.input_shapes)

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
