"""Tests for qfit.data: folder -> preprocessed, labelled, streamed batches; and every bad folder.

Expected values come from outside qfit where it matters: Pillow's own resize and colour conversion,
numpy's generator for the sampling, and the definitions of nearest / box resampling.
"""
import json
import os
import tempfile

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from PIL import Image

from qfit.data import images as image_module
from qfit.data import (Batch, DataFolder, Preprocess, load_preprocess, parse_labels_csv, read_labels_csv)
from qfit.errors import QfitError

RGB_INPUT = {"image": (1, 3, 8, 8)}


def random_pixels(seed, height, width, channels=3):
    shape = (height, width, channels) if channels > 1 else (height, width)
    return np.random.default_rng(seed).integers(0, 256, shape, dtype=np.uint8)


def write_image(path, pixels, fmt=None):
    os.makedirs(os.path.dirname(path), exist_ok=True)
    Image.fromarray(pixels).save(path, format=fmt)
    return path


def image_folder(root, count=5, height=8, width=8, channels=3, prefix="img"):
    for i in range(count):
        write_image(os.path.join(root, f"{prefix}_{i:03d}.png"), random_pixels(i, height, width, channels))
    return str(root)


def all_samples(folder, batch_size=4):
    batches = list(folder.batches(batch_size))
    return batches, np.concatenate([b.inputs[next(iter(b.inputs))] for b in batches])


def raises_naming(*fragments, match_all=True):
    """Context manager: a QfitError whose one-line message contains every fragment."""
    class Checker:
        def __enter__(self):
            self.ctx = pytest.raises(QfitError)
            self.info = self.ctx.__enter__()
            return self.info

        def __exit__(self, *exc):
            handled = self.ctx.__exit__(*exc)
            if not handled:
                return False  # another exception type: let it propagate as the failure
            message = str(self.info.value)
            assert "\n" not in message, "the CLI prints QfitError messages as one line"
            for fragment in fragments:
                assert fragment in message, f"{fragment!r} not in {message!r}"
            return handled
    return Checker()


# ------------------------------------------------------------------------------ preprocessing

def test_preprocess_matches_pillow_resize_and_formula(tmp_path):
    pixels = random_pixels(1, 30, 40)
    write_image(str(tmp_path / "a.png"), pixels)
    mean, std, scale = (0.4, 0.5, 0.6), (0.2, 0.25, 0.3), 1 / 255
    preprocess = Preprocess(size=(16, 20), resize="bilinear", mean=mean, std=std, scale=scale)
    folder = DataFolder(str(tmp_path), {"x": (1, 3, 16, 20)}, preprocess)
    (batch,) = folder.batches(8)
    # Source: Pillow's own Image.resize (size given as (W, H)) and the documented formula, in float64.
    resized = np.asarray(Image.fromarray(pixels).resize((20, 16), Image.Resampling.BILINEAR), dtype=np.float64)
    expected = ((resized * scale - np.array(mean)) / np.array(std)).transpose(2, 0, 1)[None]
    assert batch.inputs["x"].dtype == np.float32
    assert batch.inputs["x"].shape == (1, 3, 16, 20)
    np.testing.assert_allclose(batch.inputs["x"], expected, rtol=0, atol=1e-5)


@pytest.mark.parametrize("mode,pillow_filter", [("nearest", Image.Resampling.NEAREST),
                                                ("bicubic", Image.Resampling.BICUBIC),
                                                ("area", Image.Resampling.BOX)])
def test_each_resize_mode_uses_the_matching_pillow_filter(tmp_path, mode, pillow_filter):
    pixels = random_pixels(2, 21, 13)
    write_image(str(tmp_path / "a.png"), pixels)
    folder = DataFolder(str(tmp_path), {"x": (1, 3, 8, 6)}, Preprocess(size=(8, 6), resize=mode, scale=1.0))
    (batch,) = folder.batches(1)
    # Source: Pillow's Image.resize with the filter docs/data.md names for this mode.
    expected = np.asarray(Image.fromarray(pixels).resize((6, 8), pillow_filter), dtype=np.float32)
    np.testing.assert_array_equal(batch.inputs["x"][0], expected.transpose(2, 0, 1))


def test_nearest_upscale_by_two_repeats_each_pixel(tmp_path):
    pixels = random_pixels(3, 4, 5)
    write_image(str(tmp_path / "a.png"), pixels)
    folder = DataFolder(str(tmp_path), {"x": (1, 8, 10, 3)},
                        Preprocess(size=(8, 10), resize="nearest", layout="NHWC", scale=1.0))
    (batch,) = folder.batches(1)
    # Definition of nearest-neighbour resampling at an integer factor: every pixel becomes a 2x2 block.
    expected = np.repeat(np.repeat(pixels, 2, axis=0), 2, axis=1)
    np.testing.assert_array_equal(batch.inputs["x"][0], expected)


def test_area_downscale_by_two_is_the_block_mean(tmp_path):
    pixels = random_pixels(4, 8, 12)
    write_image(str(tmp_path / "a.png"), pixels)
    folder = DataFolder(str(tmp_path), {"x": (1, 4, 6, 3)},
                        Preprocess(size=(4, 6), resize="area", layout="NHWC", scale=1.0))
    (batch,) = folder.batches(1)
    # Definition of box (area) resampling at an integer factor: the mean of each 2x2 block. Pillow
    # filters in fixed point and stores 8 bits, so it may differ by up to one level.
    block_mean = pixels.astype(np.float64).reshape(4, 2, 6, 2, 3).mean(axis=(1, 3))
    assert np.abs(batch.inputs["x"][0] - block_mean).max() <= 1.0


def test_nhwc_is_nchw_with_the_channel_axis_last(tmp_path):
    image_folder(tmp_path, count=3)
    nchw = DataFolder(str(tmp_path), {"x": (1, 3, 8, 8)}, Preprocess(layout="NCHW"))
    nhwc = DataFolder(str(tmp_path), {"x": (1, 8, 8, 3)}, Preprocess(layout="NHWC"))
    _, a = all_samples(nchw)
    _, b = all_samples(nhwc)
    assert a.shape == (3, 3, 8, 8) and b.shape == (3, 8, 8, 3)
    np.testing.assert_array_equal(a, b.transpose(0, 3, 1, 2))
    # and NHWC holds the file's pixels in their stored order (source: the array written with Pillow)
    np.testing.assert_allclose(b[0] * 255, random_pixels(0, 8, 8), atol=1e-4)


def test_bgr_reverses_channels_and_takes_mean_in_model_order(tmp_path):
    pixels = random_pixels(5, 8, 8)
    write_image(str(tmp_path / "a.png"), pixels)
    mean, std = (0.1, 0.2, 0.3), (0.5, 0.6, 0.7)
    folder = DataFolder(str(tmp_path), RGB_INPUT, Preprocess(color="BGR", mean=mean, std=std))
    (batch,) = folder.batches(1)
    bgr = pixels[:, :, ::-1].astype(np.float64) / 255
    expected = ((bgr - np.array(mean)) / np.array(std)).transpose(2, 0, 1)
    np.testing.assert_allclose(batch.inputs["image"][0], expected, atol=1e-5)


def test_grayscale_uses_the_itu_r_601_luma_weights(tmp_path):
    pixels = random_pixels(6, 8, 8)
    write_image(str(tmp_path / "a.png"), pixels)
    folder = DataFolder(str(tmp_path), {"x": (1, 1, 8, 8)}, Preprocess(color="L", scale=1.0))
    (batch,) = folder.batches(1)
    # Source: Pillow's documented L conversion, ITU-R 601-2 luma L = 0.299 R + 0.587 G + 0.114 B,
    # rounded to 8 bits (so within one level).
    luma = pixels.astype(np.float64) @ np.array([0.299, 0.587, 0.114])
    assert batch.inputs["x"].shape == (1, 1, 8, 8)
    assert np.abs(batch.inputs["x"][0, 0] - luma).max() <= 1.0


def test_grayscale_file_feeds_an_rgb_model_as_three_equal_channels(tmp_path):
    write_image(str(tmp_path / "a.pgm"), random_pixels(7, 8, 8, channels=1))
    (batch,) = DataFolder(str(tmp_path), RGB_INPUT).batches(1)
    channels = batch.inputs["image"][0]
    np.testing.assert_array_equal(channels[0], channels[1])
    np.testing.assert_array_equal(channels[0], channels[2])


def test_images_of_other_size_are_resized_when_a_size_is_set(tmp_path):
    write_image(str(tmp_path / "small.png"), random_pixels(8, 5, 7))
    write_image(str(tmp_path / "large.jpg"), random_pixels(9, 31, 17))
    folder = DataFolder(str(tmp_path), RGB_INPUT, Preprocess(size=(8, 8)))
    _, samples = all_samples(folder)
    assert samples.shape == (2, 3, 8, 8)


def test_size_none_takes_the_model_input_height_and_width(tmp_path):
    image_folder(tmp_path, count=2, height=6, width=10)
    folder = DataFolder(str(tmp_path), {"x": (1, 3, 6, 10)})
    _, samples = all_samples(folder)
    assert samples.shape == (2, 3, 6, 10)


def test_extensions_are_case_insensitive_and_hidden_and_other_files_ignored(tmp_path):
    write_image(str(tmp_path / "A.PNG"), random_pixels(0, 8, 8))
    write_image(str(tmp_path / "b.Jpeg"), random_pixels(1, 8, 8), fmt="JPEG")
    write_image(str(tmp_path / "c.bmp"), random_pixels(2, 8, 8))
    write_image(str(tmp_path / "d.ppm"), random_pixels(3, 8, 8))
    write_image(str(tmp_path / ".hidden.png"), random_pixels(4, 8, 8))
    write_image(str(tmp_path / ".cache" / "e.png"), random_pixels(5, 8, 8))
    (tmp_path / "notes.txt").write_text("not data")
    folder = DataFolder(str(tmp_path), RGB_INPUT)
    assert folder.files == ["A.PNG", "b.Jpeg", "c.bmp", "d.ppm"]
    assert folder.kind == "images"


# ------------------------------------------------------------------------------ preprocess files

def test_load_preprocess_reads_every_key(tmp_path):
    path = tmp_path / "pre.json"
    path.write_text(json.dumps({"size": [96, 64], "resize": "area", "color": "BGR", "layout": "NHWC",
                                "scale": 0.5, "mean": [1, 2, 3], "std": 2}))
    assert load_preprocess(str(path)) == Preprocess(size=(96, 64), resize="area", color="BGR", layout="NHWC",
                                                    scale=0.5, mean=(1.0, 2.0, 3.0), std=(2.0,))


def test_load_preprocess_keeps_defaults_for_missing_keys(tmp_path):
    path = tmp_path / "pre.json"
    path.write_text("{}")
    assert load_preprocess(str(path)) == Preprocess()


@pytest.mark.parametrize("config,key", [({"colour": "RGB"}, "colour"), ({"size": [96]}, "size"),
                                        ({"size": [96, True]}, "size"), ({"resize": "lanczos"}, "resize"),
                                        ({"layout": "CHW"}, "layout"), ({"scale": 0}, "scale"),
                                        ({"std": [1, 0, 1]}, "std"), ({"mean": "0.5"}, "mean")])
def test_bad_input_preprocess_file_names_the_file_and_key(tmp_path, config, key):
    path = tmp_path / "pre.json"
    path.write_text(json.dumps(config))
    with raises_naming(str(path), f"'{key}'"):
        load_preprocess(str(path))


def test_bad_input_preprocess_file_not_json(tmp_path):
    path = tmp_path / "pre.json"
    path.write_text("{size: 96")
    with raises_naming(str(path), "not valid JSON", "line 1"):
        load_preprocess(str(path))


def test_bad_input_preprocess_mean_count_does_not_match_channels(tmp_path):
    image_folder(tmp_path, count=1)
    with raises_naming("mean", "2 values", "expected 1 or 3"):
        DataFolder(str(tmp_path), RGB_INPUT, Preprocess(mean=(0.1, 0.2)))


# ------------------------------------------------------------------------------ labels

def test_subfolders_are_classes_in_sorted_order(tmp_path):
    for cls, count in (("wing_nut", 2), ("bolt", 3), ("spring", 1)):
        image_folder(tmp_path / cls, count=count, prefix=cls)
    (tmp_path / "washer").mkdir()  # an empty class still takes its index
    folder = DataFolder(str(tmp_path), RGB_INPUT, role="evaluation")
    assert folder.class_names == ["bolt", "spring", "washer", "wing_nut"]
    assert folder.files[0] == "bolt/bolt_000.png"
    assert folder.labels.tolist() == [0, 0, 0, 1, 3, 3]
    assert folder.labels.dtype == np.int64
    batches = list(folder.batches(4))
    assert [b.labels.tolist() for b in batches] == [[0, 0, 0, 1], [3, 3]]
    assert batches[1].files == ["wing_nut/wing_nut_000.png", "wing_nut/wing_nut_001.png"]
    assert folder.describe()["labels"] == "subfolders"


def test_flat_folder_has_no_labels(tmp_path):
    image_folder(tmp_path, count=3)
    folder = DataFolder(str(tmp_path), RGB_INPUT)
    assert folder.labels is None and folder.class_names is None
    assert all(b.labels is None for b in folder.batches(2))


def test_csv_with_class_names_maps_them_by_the_given_class_order(tmp_path):
    image_folder(tmp_path, count=4)
    (tmp_path / "extra").mkdir()
    write_image(str(tmp_path / "extra" / "unused.png"), random_pixels(9, 8, 8))
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("file,label\nimg_002.png,dog\nimg_000.png,cat\r\n\nimg_001.png,eel\n")
    folder = DataFolder(str(tmp_path), RGB_INPUT, labels_csv=str(csv_path), role="evaluation",
                        class_order=["eel", "cat", "dog"])
    # files not named in the CSV (img_003.png, extra/unused.png) are not used
    assert folder.files == ["img_000.png", "img_001.png", "img_002.png"]
    assert folder.class_names == ["eel", "cat", "dog"]
    assert folder.labels.tolist() == [1, 0, 2]
    assert folder.describe()["labels"] == "csv"


def test_csv_with_integer_labels_and_no_header(tmp_path):
    image_folder(tmp_path, count=3)
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("img_000.png, 7\nimg_001.png,0\n./img_002.png,3\n")
    folder = DataFolder(str(tmp_path), RGB_INPUT, labels_csv=str(csv_path), num_classes=10)
    assert folder.labels.tolist() == [7, 0, 3]
    assert folder.class_names is None


def test_csv_class_names_use_subfolder_indices_when_both_exist(tmp_path):
    for cls in ("b_class", "a_class", "c_class"):
        image_folder(tmp_path / cls, count=1, prefix=cls)
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("c_class\\c_class_000.png,c_class\nb_class/b_class_000.png,b_class\n")
    folder = DataFolder(str(tmp_path), RGB_INPUT, labels_csv=str(csv_path))
    assert folder.class_names == ["a_class", "b_class", "c_class"]
    assert folder.files == ["b_class/b_class_000.png", "c_class/c_class_000.png"]
    assert folder.labels.tolist() == [1, 2]


def test_csv_integer_labels_are_not_bounded_by_non_class_subfolders(tmp_path):
    image_folder(tmp_path / "day1", count=1, prefix="a")
    image_folder(tmp_path / "day2", count=1, prefix="b")
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("day1/a_000.png,5\nday2/b_000.png,9\n")
    folder = DataFolder(str(tmp_path), RGB_INPUT, labels_csv=str(csv_path))
    assert folder.labels.tolist() == [5, 9] and folder.class_names is None


def test_symlinked_class_folders_are_followed_once(tmp_path):
    store = tmp_path / "store"
    image_folder(store / "bolt", count=2, prefix="bolt")
    split = tmp_path / "split"
    split.mkdir()
    os.symlink(store / "bolt", split / "bolt")
    os.symlink(split, split / "bolt" / "loop")  # a cycle must not be walked forever
    folder = DataFolder(str(split), RGB_INPUT)
    assert folder.files == ["bolt/bolt_000.png", "bolt/bolt_001.png"]
    assert folder.class_names == ["bolt"]


# ------------------------------------------------------------------------------ limit and streaming

def test_limit_is_seeded_sampling_kept_sorted(tmp_path):
    image_folder(tmp_path, count=20)
    every = DataFolder(str(tmp_path), RGB_INPUT).files
    first = DataFolder(str(tmp_path), RGB_INPUT, limit=6, seed=3).files
    again = DataFolder(str(tmp_path), RGB_INPUT, limit=6, seed=3).files
    other = DataFolder(str(tmp_path), RGB_INPUT, limit=6, seed=4).files
    assert first == again and first == sorted(first) and len(set(first)) == 6
    assert first != other
    # Source: numpy's Generator.choice without replacement over the sorted list, then sorted.
    chosen = np.sort(np.random.default_rng(3).choice(20, size=6, replace=False))
    assert first == [every[i] for i in chosen]


def test_limit_at_or_above_the_count_keeps_everything(tmp_path):
    image_folder(tmp_path, count=4)
    assert len(DataFolder(str(tmp_path), RGB_INPUT, limit=4)) == 4
    assert len(DataFolder(str(tmp_path), RGB_INPUT, limit=100)) == 4


def test_limit_keeps_labels_aligned(tmp_path):
    for cls in ("a", "b", "c"):
        image_folder(tmp_path / cls, count=5, prefix=cls)
    folder = DataFolder(str(tmp_path), RGB_INPUT, limit=7, seed=1)
    assert [("abc"[label], f.split("/")[0]) for label, f in zip(folder.labels, folder.files)] == \
        [(f.split("/")[0], f.split("/")[0]) for f in folder.files]


def test_batches_stack_samples_and_leave_a_short_last_batch(tmp_path):
    image_folder(tmp_path, count=10)
    folder = DataFolder(str(tmp_path), RGB_INPUT)
    batches, samples = all_samples(folder, batch_size=4)
    assert [b.inputs["image"].shape[0] for b in batches] == [4, 4, 2]
    assert all(isinstance(b, Batch) for b in batches)
    one_by_one = np.concatenate([b.inputs["image"] for b in folder.batches(1)])
    np.testing.assert_array_equal(samples, one_by_one)
    assert [f for b in batches for f in b.files] == folder.files


def test_batches_read_files_lazily(tmp_path, monkeypatch):
    image_folder(tmp_path, count=12)
    folder = DataFolder(str(tmp_path), RGB_INPUT)
    opened = []
    real_open = image_module.Image.open

    def counting_open(path, *args, **kwargs):
        opened.append(path)
        return real_open(path, *args, **kwargs)

    monkeypatch.setattr(image_module.Image, "open", counting_open)
    iterator = folder.batches(3)
    next(iterator)
    assert len(opened) == 3, "only the first batch's files are read before it is yielded"


# ------------------------------------------------------------------------------ arrays

def test_npy_with_and_without_batch_dim_and_integer_dtype(tmp_path):
    rng = np.random.default_rng(0)
    a = rng.normal(size=(1, 4, 3)).astype(np.float64)
    b = rng.integers(-5, 5, size=(4, 3)).astype(np.int16)
    np.save(tmp_path / "a.npy", a)
    np.save(tmp_path / "b.npy", b)
    folder = DataFolder(str(tmp_path), {"features": (8, 4, 3)})
    assert folder.kind == "arrays"
    (batch,) = folder.batches(5)
    assert batch.inputs["features"].dtype == np.float32
    np.testing.assert_array_equal(batch.inputs["features"], np.stack([a[0], b]).astype(np.float32))


def test_npz_keys_are_input_names_for_multi_input_models(tmp_path):
    np.savez(tmp_path / "s0.npz", audio=np.ones((1, 16)), meta=np.arange(3))
    np.savez(tmp_path / "s1.npz", audio=np.zeros(16), meta=np.full((1, 3), 2.0))
    folder = DataFolder(str(tmp_path), {"audio": (1, 16), "meta": (1, 3)})
    (batch,) = folder.batches(2)
    assert set(batch.inputs) == {"audio", "meta"}
    np.testing.assert_array_equal(batch.inputs["meta"], [[0, 1, 2], [2, 2, 2]])
    np.testing.assert_array_equal(batch.inputs["audio"][0], np.ones(16))


def test_npz_single_key_of_any_name_feeds_a_single_input_model(tmp_path):
    np.savez(tmp_path / "s.npz", arr_0=np.full((2, 2), 5.0))
    (batch,) = DataFolder(str(tmp_path), {"x": (1, 2, 2)}).batches(1)
    np.testing.assert_array_equal(batch.inputs["x"], np.full((1, 2, 2), 5.0))


def test_npz_written_compressed_reads_the_same(tmp_path):
    values = np.random.default_rng(1).normal(size=(3, 5))
    np.savez_compressed(tmp_path / "s.npz", x=values)
    (batch,) = DataFolder(str(tmp_path), {"x": (1, 3, 5)}).batches(1)
    np.testing.assert_array_equal(batch.inputs["x"][0], values.astype(np.float32))


def test_bad_input_corrupt_compressed_npz(tmp_path):
    np.savez_compressed(tmp_path / "s.npz", x=np.random.default_rng(1).normal(size=(64, 64)))
    raw = bytearray((tmp_path / "s.npz").read_bytes())
    raw[200:260] = b"\x00" * 60  # inside the deflated data: the zip directory still parses
    (tmp_path / "s.npz").write_bytes(bytes(raw))
    with raises_naming("s.npz", "cannot read"):
        folder = DataFolder(str(tmp_path), {"x": (1, 64, 64)})
        list(folder.batches(1))


def test_npy_stack_of_samples_is_refused_with_a_hint(tmp_path):
    np.save(tmp_path / "stack.npy", np.zeros((5, 4)))
    with raises_naming("stack.npy", "(5, 4)", "one sample"):
        DataFolder(str(tmp_path), {"x": (1, 4)})


# ------------------------------------------------------------------------------ bad input

def test_bad_input_missing_folder(tmp_path):
    missing = str(tmp_path / "nowhere")
    with raises_naming(missing, "no such folder"):
        DataFolder(missing, RGB_INPUT)


def test_bad_input_folder_is_a_file(tmp_path):
    path = tmp_path / "file.png"
    path.write_bytes(b"x")
    with raises_naming(str(path), "not a folder"):
        DataFolder(str(path), RGB_INPUT)


def test_bad_input_empty_folder(tmp_path):
    with raises_naming("no image or .npy/.npz files in", str(tmp_path)):
        DataFolder(str(tmp_path), RGB_INPUT)


def test_bad_input_only_non_data_files(tmp_path):
    (tmp_path / "readme.txt").write_text("hello")
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "data.csv").write_text("1,2")
    with raises_naming("no image or .npy/.npz files in", str(tmp_path), "2 other files"):
        DataFolder(str(tmp_path), RGB_INPUT)


def test_bad_input_mixed_image_sizes_without_size(tmp_path):
    write_image(str(tmp_path / "a.png"), random_pixels(0, 8, 8))
    write_image(str(tmp_path / "b.png"), random_pixels(1, 8, 9))
    with raises_naming("b.png", "8x9", "8x8", "set a target size"):
        DataFolder(str(tmp_path), RGB_INPUT)
    assert len(DataFolder(str(tmp_path), RGB_INPUT, Preprocess(size=(8, 8)))) == 2


def test_bad_input_corrupt_image(tmp_path):
    image_folder(tmp_path, count=3)
    (tmp_path / "broken.png").write_bytes(b"\x89PNG\r\n\x1a\n this is not an image")
    with raises_naming("broken.png", "cannot read image", "skip"):
        DataFolder(str(tmp_path), RGB_INPUT)
    folder = DataFolder(str(tmp_path), RGB_INPUT, skip_bad=True)
    assert len(folder) == 3
    assert [f for f, _ in folder.skipped] == ["broken.png"]
    assert folder.describe()["skipped"] == 1
    _, samples = all_samples(folder)
    assert samples.shape[0] == 3


def test_bad_input_truncated_image_found_while_streaming(tmp_path):
    image_folder(tmp_path, count=4)
    write_image(str(tmp_path / "img_001b.jpg"), random_pixels(9, 64, 64), fmt="JPEG")
    full = (tmp_path / "img_001b.jpg").read_bytes()
    (tmp_path / "img_001b.jpg").write_bytes(full[: len(full) // 2])  # header intact, pixel data cut
    strict = DataFolder(str(tmp_path), RGB_INPUT, Preprocess(size=(8, 8)))
    with raises_naming("img_001b.jpg", "cannot read image"):
        list(strict.batches(2))
    lenient = DataFolder(str(tmp_path), RGB_INPUT, Preprocess(size=(8, 8)), skip_bad=True)
    assert len(lenient) == 5  # not yet known: the header was fine
    batches = list(lenient.batches(2))
    assert [len(b.files) for b in batches] == [2, 2]  # the gap is filled from the next files
    assert len(lenient) == 4 and [f for f, _ in lenient.skipped] == ["img_001b.jpg"]
    assert sum(len(b.files) for b in lenient.batches(2)) == 4  # a second pass does not skip it again
    assert len(lenient.skipped) == 1


def test_bad_input_npy_wrong_shape(tmp_path):
    np.save(tmp_path / "a.npy", np.zeros((1, 3, 8, 8), np.float32))
    np.save(tmp_path / "b.npy", np.zeros((3, 8, 7), np.float32))
    with raises_naming("b.npy", "(3, 8, 7)", "(1, 3, 8, 8)", "'image'"):
        DataFolder(str(tmp_path), RGB_INPUT)


@pytest.mark.parametrize("values", [np.array([["a"] * 8] * 8), np.zeros((8, 8), dtype="datetime64[s]"),
                                    np.zeros((8, 8), dtype=np.complex64)])
def test_bad_input_npy_wrong_dtype(tmp_path, values):
    np.save(tmp_path / "a.npy", values)
    with raises_naming("a.npy", str(values.dtype), "numeric"):
        DataFolder(str(tmp_path), {"x": (1, 8, 8)})


def test_bad_input_pickled_npy(tmp_path):
    objects = np.empty((1, 2), dtype=object)
    objects[0, 0], objects[0, 1] = {"a": 1}, [2]
    np.save(tmp_path / "p.npy", objects, allow_pickle=True)
    with raises_naming("p.npy", "contains pickled objects; refused"):
        DataFolder(str(tmp_path), {"x": (1, 2)}, skip_bad=True)  # refused even with skip_bad


def test_bad_input_pickled_npz(tmp_path):
    objects = np.empty((2,), dtype=object)
    objects[0], objects[1] = "a", 1
    np.savez(tmp_path / "p.npz", x=objects, allow_pickle=True)
    with raises_naming("p.npz", "contains pickled objects; refused"):
        DataFolder(str(tmp_path), {"x": (1, 2)})


def test_bad_input_raw_pickle_renamed_npy(tmp_path):
    import pickle  # only to write the hostile file; qfit never unpickles
    (tmp_path / "p.npy").write_bytes(pickle.dumps([1.0, 2.0], protocol=4))
    with raises_naming("p.npy", "contains pickled objects; refused"):
        DataFolder(str(tmp_path), {"x": (1, 2)})


def test_bad_input_unreadable_npy(tmp_path):
    np.save(tmp_path / "good.npy", np.zeros(2))
    (tmp_path / "bad.npy").write_bytes(b"\x93NUMPY\x01\x00garbage")
    with raises_naming("bad.npy", "cannot read .npy"):
        DataFolder(str(tmp_path), {"x": (1, 2)})
    assert len(DataFolder(str(tmp_path), {"x": (1, 2)}, skip_bad=True)) == 1


def test_bad_input_nan_in_input(tmp_path):
    np.save(tmp_path / "a.npy", np.zeros(4))
    np.save(tmp_path / "b.npy", np.array([0.0, np.nan, 1.0, 2.0]))
    folder = DataFolder(str(tmp_path), {"x": (1, 4)})
    with raises_naming("b.npy", "NaN"):
        list(folder.batches(2))


def test_bad_input_inf_in_input(tmp_path):
    np.savez(tmp_path / "a.npz", x=np.array([0.0, -np.inf]))
    with raises_naming("a.npz", "'x'", "Inf"):
        list(DataFolder(str(tmp_path), {"x": (1, 2)}).batches(1))


def test_bad_input_float64_that_overflows_float32_is_inf(tmp_path):
    np.save(tmp_path / "a.npy", np.array([1e39]))
    with raises_naming("a.npy", "Inf", "float32"):
        list(DataFolder(str(tmp_path), {"x": (1, 1)}).batches(1))


def test_bad_input_csv_missing_file(tmp_path):
    image_folder(tmp_path, count=2)
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("file,label\nimg_000.png,0\nimg_999.png,1\n")
    with raises_naming(str(csv_path), "line 3", "img_999.png", "no such file"):
        DataFolder(str(tmp_path), RGB_INPUT, labels_csv=str(csv_path))


def test_bad_input_csv_unknown_class_index(tmp_path):
    image_folder(tmp_path, count=2)
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("img_000.png,0\nimg_001.png,10\n")
    with raises_naming(str(csv_path), "line 2", "unknown class 10", "0..9"):
        DataFolder(str(tmp_path), RGB_INPUT, labels_csv=str(csv_path), num_classes=10)


def test_bad_input_csv_unknown_class_name(tmp_path):
    for cls in ("cat", "dog"):
        image_folder(tmp_path / cls, count=1, prefix=cls)
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("cat/cat_000.png,cat\ndog/dog_000.png,wolf\n")
    with raises_naming(str(csv_path), "line 2", "unknown class 'wolf'", "cat, dog"):
        DataFolder(str(tmp_path), RGB_INPUT, labels_csv=str(csv_path))


@pytest.mark.parametrize("path_text", ["../outside.png", "sub/../../outside.png", "..\\outside.png"])
def test_bad_input_csv_parent_path(tmp_path, path_text):
    data = tmp_path / "data"
    image_folder(data, count=1)
    write_image(str(tmp_path / "outside.png"), random_pixels(0, 8, 8))
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text(f"img_000.png,0\n{path_text},1\n")
    with raises_naming("line 2", path_text, "outside the data folder; refused"):
        DataFolder(str(data), RGB_INPUT, labels_csv=str(csv_path))


def test_bad_input_csv_absolute_path(tmp_path):
    image_folder(tmp_path, count=1)
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text(f"{tmp_path / 'img_000.png'},0\n")
    with raises_naming("line 1", "absolute path"):
        DataFolder(str(tmp_path), RGB_INPUT, labels_csv=str(csv_path))


def test_bad_input_csv_duplicate_file(tmp_path):
    image_folder(tmp_path, count=1)
    csv_path = tmp_path / "labels.csv"
    csv_path.write_text("img_000.png,0\n./img_000.png,1\n")
    with raises_naming("line 2", "listed again", "line 1"):
        DataFolder(str(tmp_path), RGB_INPUT, labels_csv=str(csv_path))


def test_bad_input_csv_missing(tmp_path):
    image_folder(tmp_path, count=1)
    with raises_naming("labels CSV", "nope.csv", "no such file"):
        DataFolder(str(tmp_path), RGB_INPUT, labels_csv=str(tmp_path / "nope.csv"))


def test_bad_input_more_class_subfolders_than_model_classes(tmp_path):
    for cls in ("a", "b", "c"):
        image_folder(tmp_path / cls, count=1, prefix=cls)
    with raises_naming("3 class subfolders", "2 classes"):
        DataFolder(str(tmp_path), RGB_INPUT, num_classes=2)


def test_bad_input_mixed_images_and_arrays(tmp_path):
    image_folder(tmp_path, count=1)
    np.save(tmp_path / "a.npy", np.zeros((3, 8, 8)))
    with raises_naming("mixes images and arrays", "img_000.png", "a.npy"):
        DataFolder(str(tmp_path), RGB_INPUT)


def test_bad_input_images_for_a_multi_input_model(tmp_path):
    image_folder(tmp_path, count=1)
    with raises_naming("2 inputs", "single-input", ".npz"):
        DataFolder(str(tmp_path), {"a": (1, 3, 8, 8), "b": (1, 4)})


def test_bad_input_channel_count_mismatch_suggests_the_layout(tmp_path):
    image_folder(tmp_path, count=1)
    with raises_naming("'image'", "8 channels", "NCHW", "layout NHWC"):
        DataFolder(str(tmp_path), {"image": (1, 8, 8, 3)})
    with raises_naming("1 channels", "color RGB gives 3", "color L"):
        DataFolder(str(tmp_path), {"image": (1, 1, 8, 8)})


def test_bad_input_npz_keys_do_not_match_inputs(tmp_path):
    np.savez(tmp_path / "s.npz", audio=np.zeros(4), other=np.zeros(2))
    with raises_naming("s.npz", "no key for input(s) meta", "other"):
        DataFolder(str(tmp_path), {"audio": (1, 4), "meta": (1, 2)})


def test_bad_input_sixteen_bit_image_refused(tmp_path):
    Image.fromarray(np.full((8, 8), 40000, dtype=np.uint16)).save(tmp_path / "deep.png")
    with raises_naming("deep.png", "more than 8 bits"):
        DataFolder(str(tmp_path), {"x": (1, 1, 8, 8)}, Preprocess(color="L"))


# ------------------------------------------------------------------------------ properties

CSV_TOKENS = st.sampled_from(["img_000.png", "img_001.png", "sub/a.npy", "../x.png", "/abs.png", "C:\\x.png",
                              "file", "label", "cat", "0", "1", "-1", "99", "٣", ",", ",", "\n", "\r\n",
                              '"', '""', " ", "\x00", "\\", ".", "..", "é"])
CSV_ROW = st.tuples(st.sampled_from(["img_000.png", "img_001.png", "./sub/a.npy", "sub\\a.npy", "../x.png", "x"]),
                    st.sampled_from(["0", "1", " 2 ", "cat", "dog", "-1", "", "a,b"]),
                    st.sampled_from(["\n", "\r\n", "\n\n"])).map(lambda row: f"{row[0]},{row[1]}{row[2]}")
CSV_LIKE_TEXT = st.one_of(st.text(), st.lists(CSV_TOKENS, max_size=40).map("".join),
                          st.lists(st.one_of(CSV_ROW, CSV_TOKENS), max_size=6).map("".join))


@settings(max_examples=400, deadline=None)
@given(text=CSV_LIKE_TEXT, class_names=st.one_of(st.none(), st.just(["cat", "dog"])),
       num_classes=st.one_of(st.none(), st.integers(1, 5)))
def test_csv_reader_raises_only_qfit_errors(text, class_names, num_classes):
    known = {"img_000.png", "img_001.png", "sub/a.npy"}
    try:
        files, labels, names = parse_labels_csv(text, "labels CSV t.csv", known, "data", class_names, num_classes)
    except QfitError as e:
        assert "\n" not in str(e) or "\n" in text  # one line, unless the user's text put a newline in it
        return
    assert files == sorted(files) and set(files) <= known and len(labels) == len(files)
    assert all(isinstance(label, int) and label >= 0 for label in labels)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(raw=st.one_of(st.binary(max_size=200), CSV_LIKE_TEXT.map(lambda t: t.encode("utf-8", "surrogatepass"))))
def test_csv_file_reader_raises_only_qfit_errors_on_any_bytes(raw):
    with tempfile.TemporaryDirectory() as folder:
        path = os.path.join(folder, "labels.csv")
        with open(path, "wb") as f:
            f.write(raw)
        try:
            read_labels_csv(path, {"img_000.png"}, folder)
        except QfitError:
            pass


def _valid_file_bytes():
    png, npy, npz = (tempfile.TemporaryFile() for _ in range(3))
    Image.fromarray(random_pixels(0, 8, 8)).save(png, format="PNG")
    np.save(npy, np.random.default_rng(0).normal(size=(3, 8, 8)))
    np.savez_compressed(npz, image=np.random.default_rng(1).normal(size=(3, 8, 8)))
    contents = {}
    for name, f in (("a.png", png), ("a.npy", npy), ("a.npz", npz)):
        f.seek(0)
        contents[name] = f.read()
        f.close()
    return contents


VALID_FILES = _valid_file_bytes()


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(name=st.sampled_from(sorted(VALID_FILES)), data=st.data())
def test_mutated_data_files_raise_only_qfit_errors(name, data):
    raw = bytearray(VALID_FILES[name])
    edits = data.draw(st.lists(st.tuples(st.integers(0, len(raw) - 1), st.integers(0, 255)), max_size=8))
    for position, value in edits:
        raw[position] = value
    cut = data.draw(st.integers(0, len(raw)))
    skip_bad = data.draw(st.booleans())
    with tempfile.TemporaryDirectory() as folder:
        with open(os.path.join(folder, name), "wb") as f:
            f.write(bytes(raw[:cut]))
        try:
            loaded = DataFolder(folder, RGB_INPUT, skip_bad=skip_bad)
            for batch in loaded.batches(1):
                assert batch.inputs["image"].shape == (1, 3, 8, 8)
                assert np.isfinite(batch.inputs["image"]).all()
        except QfitError as e:
            assert name in str(e) or "no readable files" in str(e)
