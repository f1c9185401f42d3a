"""IDX and .npz loaders against files written here with struct, gzip and numpy.

IDX layout (LeCun, Cortes & Burges, the MNIST distribution page; CHECKS.md): big-endian
magic 0x00000803 (unsigned bytes, 3 dimensions) for images and 0x00000801 for labels, one
32-bit size per dimension, then the data in row-major order. Gzip members start with the
bytes 1f 8b (RFC 1952, sec. 2.3.1). The .npz format is numpy's (``numpy.savez``).
"""
import gzip
import re
import struct
import tracemalloc

import numpy as np
import pytest

from jostle import datasets
from jostle.datasets.idx import read_idx


def write_idx(path, array, magic=None, zipped=False, cut=0, extra=b""):
    array = np.ascontiguousarray(array, dtype=np.uint8)
    magic = magic if magic is not None else 0x00000800 | array.ndim
    blob = struct.pack(">I", magic) + struct.pack(f">{array.ndim}I", *array.shape) + array.tobytes() + extra
    blob = blob[: len(blob) - cut] if cut else blob
    path.write_bytes(gzip.compress(blob) if zipped else blob)
    return path


@pytest.fixture
def idx_files(tmp_path):
    rng = np.random.default_rng(0)
    images = rng.integers(0, 256, size=(30, 5, 7), dtype=np.uint8)  # H != W catches a swapped axis
    labels = np.arange(30) % 3
    test_images = rng.integers(0, 256, size=(9, 5, 7), dtype=np.uint8)
    test_labels = np.arange(9) % 3
    paths = (write_idx(tmp_path / "train-images", images), write_idx(tmp_path / "train-labels", labels),
             write_idx(tmp_path / "test-images", test_images), write_idx(tmp_path / "test-labels", test_labels))
    return paths, (images, labels, test_images, test_labels)


def test_idx_round_trip_keeps_pixels_labels_and_shape(idx_files):
    paths, (images, labels, test_images, test_labels) = idx_files
    data = datasets.from_idx(*paths)
    assert data.image_shape == (1, 5, 7) and data.n_features == 35 and data.name == "train-images"
    # bytes over 255 in float32 on both sides: the same exact-rounded division
    np.testing.assert_array_equal(data.x_train.numpy(), images.reshape(30, -1).astype(np.float32) / np.float32(255))
    np.testing.assert_array_equal(data.x_test.numpy(), test_images.reshape(9, -1).astype(np.float32) / np.float32(255))
    np.testing.assert_array_equal(data.y_train.numpy(), labels)
    np.testing.assert_array_equal(data.y_test.numpy(), test_labels)
    assert data.classes == ["0", "1", "2"]
    assert data.bounds[0].tolist() == [0.0] * 35 and data.bounds[1].tolist() == [1.0] * 35
    named = datasets.from_idx(*paths, classes=["dial", "gauge", "seal"])
    assert named.classes == ["dial", "gauge", "seal"]


def test_gzipped_idx_is_found_by_its_magic_bytes_and_reads_the_same(idx_files, tmp_path):
    paths, arrays = idx_files
    # one gzipped file without a .gz suffix, one with: detection is by the bytes 1f 8b
    zipped = [write_idx(tmp_path / f"z{k}{'' if k % 2 else '.gz'}", a, zipped=True) for k, a in enumerate(arrays)]
    assert zipped[1].read_bytes()[:2] == b"\x1f\x8b" and zipped[1].suffix == ""
    plain, packed = datasets.from_idx(*paths), datasets.from_idx(*zipped)
    for name in ("x_train", "y_train", "x_test", "y_test"):
        assert np.array_equal(getattr(plain, name).numpy(), getattr(packed, name).numpy())  # integer work: exact
    assert packed.name == "z0"  # the name drops .gz


def test_idx_without_test_files_holds_out_a_seeded_share_of_each_class(idx_files):
    paths, (images, labels, _, _) = idx_files
    data = datasets.from_idx(paths[0], paths[1], test_fraction=0.2, seed=3)
    assert np.bincount(data.y_test.numpy()).tolist() == [2, 2, 2]  # round(0.2 * 10) of each class
    every = np.concatenate([data.x_train.numpy(), data.x_test.numpy()]) * 255
    assert sorted(map(tuple, every.round().astype(int))) == sorted(map(tuple, images.reshape(30, -1).astype(int)))
    again, other = datasets.from_idx(paths[0], paths[1], seed=3), datasets.from_idx(paths[0], paths[1], seed=4)
    assert np.array_equal(again.x_test.numpy(), data.x_test.numpy())  # same seed, same rows: exact
    assert not np.array_equal(other.x_test.numpy(), data.x_test.numpy())


def test_uncompressed_idx_is_memory_mapped_and_converted_once(tmp_path):
    # A peak of numpy allocations near one float32 copy (plus one block) shows no second full
    # copy is made; two float copies would be at least 2x. tracemalloc sees numpy's buffers.
    images = np.random.default_rng(1).integers(0, 256, size=(6000, 28, 28), dtype=np.uint8)
    image_path = write_idx(tmp_path / "im", images)
    label_path = write_idx(tmp_path / "lb", np.arange(6000) % 10)
    assert isinstance(read_idx(image_path, 0x00000803), np.memmap)
    result_bytes = images.size * 4
    for pair in ((image_path, label_path), (write_idx(tmp_path / "im.gz", images, zipped=True), label_path)):
        tracemalloc.start()
        data = datasets.from_idx(*pair, test_fraction=0.1)
        peak = tracemalloc.get_traced_memory()[1]
        tracemalloc.stop()
        assert data.x_train.shape == (5400, 784)
        assert peak < 1.6 * result_bytes, f"peak {peak / 1e6:.1f} MB for a {result_bytes / 1e6:.1f} MB result"


def test_every_bad_idx_file_is_named(idx_files, tmp_path):
    (images_path, labels_path, test_images, test_labels), (images, labels, _, _) = idx_files

    def refused(pattern, *args, error=ValueError, **kwargs):
        with pytest.raises(error, match=pattern):
            datasets.from_idx(*args, **kwargs)

    refused(r"train-labels is not an IDX image file: magic number 0x00000801, expected 0x00000803 "
            r"\(unsigned bytes, 3 dimensions\)", labels_path, labels_path)
    refused(r"train-images is not an IDX label file: magic number 0x00000803, expected 0x00000801",
            images_path, images_path)
    short = write_idx(tmp_path / "short-images", images, cut=5)
    refused(r"short-images is truncated: its header promises 30 x 5 x 7 = 1050 bytes of data, found 1045",
            short, labels_path)
    refused(r"short-gz is truncated: its header promises 30 x 5 x 7 = 1050 bytes",
            write_idx(tmp_path / "short-gz", images, cut=5, zipped=True), labels_path)
    stub = tmp_path / "stub-images"
    stub.write_bytes(struct.pack(">I", 0x803) + b"\x00\x00")
    refused(r"stub-images is truncated inside its header \(6 of 16 bytes\)", stub, labels_path)
    long = write_idx(tmp_path / "long-images", images, extra=b"\x00")
    refused(r"long-images is longer than its header says", long, labels_path)
    refused(r"long-gz is longer than its header says",
            write_idx(tmp_path / "long-gz", images, extra=b"\x00", zipped=True), labels_path)
    broken = tmp_path / "broken-images.gz"
    broken.write_bytes(gzip.compress(images_path.read_bytes())[:-30])  # a cut gzip stream
    refused(r"broken-images.gz is a truncated or damaged gzip file", broken, labels_path)
    few = write_idx(tmp_path / "few-labels", labels[:29])
    refused(r"few-labels holds 29 labels but .*train-images holds 30 images; they must match", images_path, few)
    wide = write_idx(tmp_path / "wide-images", np.zeros((9, 5, 8)))
    refused(r"wide-images holds 5x8 images but .*train-images holds 5x7 images", images_path, labels_path,
            wide, test_labels)
    refused(r"test_images and test_labels must be given together; got test_images=.*, test_labels=None",
            images_path, labels_path, test_images)
    refused(r"no such IDX file: .*missing-images", tmp_path / "missing-images", labels_path, error=FileNotFoundError)


@pytest.fixture
def npz_arrays():
    rng = np.random.default_rng(2)
    x = rng.integers(0, 256, size=(40, 6, 4), dtype=np.uint8)
    return x, np.arange(40) % 4


def test_npz_round_trip_of_byte_images(tmp_path, npz_arrays):
    x, y = npz_arrays
    path = tmp_path / "cards.npz"
    np.savez(path, x=x, y=y)
    data = datasets.from_npz(path, test_fraction=0.25, seed=1)
    assert data.image_shape == (1, 6, 4) and data.name == "cards" and data.classes == ["0", "1", "2", "3"]
    assert np.bincount(data.y_test.numpy()).tolist() == [2, 2, 2, 2] and data.x_train.shape == (32, 24)
    expected = {(int(label), row.tobytes()) for row, label in zip(x.reshape(40, -1), y)}
    scaled = [(data.x_train, data.y_train), (data.x_test, data.y_test)]
    got = {(int(label), (row * 255).round().astype(np.uint8).tobytes()) for xs, ys in scaled
           for row, label in zip(xs.numpy(), ys.numpy())}
    assert got == expected  # every stored image comes back once, with its label
    assert float(data.x_train.max()) <= 1.0 and data.bounds[1].tolist() == [1.0] * 24
    again = datasets.from_npz(path, test_fraction=0.25, seed=1)
    assert np.array_equal(again.x_train.numpy(), data.x_train.numpy())  # same seed: exact
    assert not np.array_equal(datasets.from_npz(path, test_fraction=0.25, seed=2).x_test.numpy(), data.x_test.numpy())


def test_npz_layouts_keys_string_labels_and_given_test_arrays(tmp_path):
    rng = np.random.default_rng(3)
    colour_last = rng.random((10, 5, 6, 3)).astype(np.float32)  # (N, H, W, C), floats in [0, 1]
    names = np.array(["leak", "steady"] * 5)
    np.savez(tmp_path / "hwc.npz", images=colour_last, kinds=names, images_test=colour_last[:4],
             kinds_test=names[:4])
    data = datasets.from_npz(tmp_path / "hwc.npz", x_key="images", y_key="kinds")
    assert data.image_shape == (3, 5, 6) and data.classes == ["leak", "steady"]
    # floats already in [0, 1] are kept exactly, laid out (C, H, W)
    np.testing.assert_array_equal(data.x_train.numpy(), colour_last.transpose(0, 3, 1, 2).reshape(10, -1))
    np.testing.assert_array_equal(data.y_test.numpy(), [0, 1, 0, 1])
    chw = rng.random((12, 3, 4, 4))
    np.savez(tmp_path / "chw.npz", x=chw, y=np.arange(12) % 2)
    assert datasets.from_npz(tmp_path / "chw.npz").image_shape == (3, 4, 4)
    table = rng.normal(size=(20, 3)) * 5
    np.savez(tmp_path / "table.npz", x=table, y=np.arange(20) % 2)
    vectors = datasets.from_npz(tmp_path / "table.npz", classes=["steady", "leak"])
    assert vectors.image_shape is None and vectors.classes == ["steady", "leak"]
    every = np.concatenate([vectors.x_train.numpy(), vectors.x_test.numpy()])
    assert sorted(map(tuple, every)) == sorted(map(tuple, table.astype(np.float32)))  # copies: exact


def test_every_bad_npz_file_is_named(tmp_path, npz_arrays):
    x, y = npz_arrays

    def refused(pattern, path, **kwargs):
        with pytest.raises(ValueError, match=pattern):
            datasets.from_npz(path, **kwargs)

    text = tmp_path / "notes.npz"
    text.write_text("not an archive")
    refused(r"notes.npz is not a readable .npz archive of arrays", text)
    np.savez(tmp_path / "good.npz", x=x, y=y)
    cut = tmp_path / "cut.npz"
    cut.write_bytes((tmp_path / "good.npz").read_bytes()[:-200])
    refused(r"cut.npz is not a readable .npz archive", cut)
    refused(r"good.npz has no array named 'images'; it holds \['x', 'y'\]", tmp_path / "good.npz", x_key="images")
    np.savez(tmp_path / "counts.npz", x=x, y=y[:39])
    refused(r"counts.npz holds 39 labels in 'y' but 40 points in 'x'; they must match", tmp_path / "counts.npz")
    np.savez(tmp_path / "pickled.npz", x=x, y=np.array([{"a": 1}] * 40, dtype=object))
    refused(r"array 'y' in .*pickled.npz cannot be read without unpickling", tmp_path / "pickled.npz")
    np.savez(tmp_path / "scaled.npz", x=x.astype(np.float32) / 127.5 - 1, y=y)
    refused(r"float images in .*scaled.npz must lie in \[0, 1\] \(bytes are scaled by 1/255\); got values in "
            r"\[-1, 1\]", tmp_path / "scaled.npz")
    np.savez(tmp_path / "wide.npz", x=x.astype(np.int32) * 2, y=y)
    refused(r"integer images in .*wide.npz must hold values 0..255; got 0..510", tmp_path / "wide.npz")
    np.save(tmp_path / "single.npy", x)
    refused(r"single.npy is a single .npy array, not an .npz archive", tmp_path / "single.npy")
    np.savez(tmp_path / "fuzzy.npz", x=x, y=y + 0.5)
    refused(r"labels in .*fuzzy.npz \(array 'y'\) must be integers or strings; got dtype float64",
            tmp_path / "fuzzy.npz")
    refused(re.escape("test_fraction must be a finite float > 0 and < 1; got 0"), tmp_path / "good.npz",
            test_fraction=0.0)
    refused(r"classes must name every label in .*good.npz \(0..3\); got 2 names", tmp_path / "good.npz",
            classes=["a", "b"])
    with pytest.raises(FileNotFoundError, match=r"no such .npz file: .*absent.npz"):
        datasets.from_npz(tmp_path / "absent.npz")
