"""Folder and torch-Dataset loaders against image files written here with Pillow.

Pillow's modes (L greyscale, RGB colour, I;16 16-bit) and its bilinear resize are the
reference (Pillow handbook, "Concepts: modes"; ``Image.resize``).
"""
import re

import numpy as np
import pytest
import torch
from PIL import Image

from jostle import datasets


def grey(rng, size=(6, 5)):
    return rng.integers(0, 256, size=size, dtype=np.uint8)


@pytest.fixture
def folder(tmp_path):
    """Three classes of 6x5 greyscale PNGs, 5 images each, plus files the loader must skip."""
    rng = np.random.default_rng(0)
    root = tmp_path / "meters"
    stored = []
    for name in ("gauge", "dial", "seal"):
        (root / name).mkdir(parents=True)
        for k in range(5):
            pixels = grey(rng)
            Image.fromarray(pixels, mode="L").save(root / name / f"card{k}.png")
            stored.append((name, pixels))
    (root / "README.txt").write_text("top-level files are not class folders")
    (root / "dial" / ".DS_Store").write_bytes(b"\x00\x01")
    (root / ".cache").mkdir()
    return root, stored


def rows_and_names(data):
    pairs = [(data.x_train, data.y_train), (data.x_test, data.y_test)]
    return [(data.classes[int(label)], row) for xs, ys in pairs for row, label in zip(xs.numpy(), ys.numpy())]


def test_folder_round_trip_of_greyscale_images(folder):
    root, stored = folder
    data = datasets.from_folder(root, test_fraction=0.4, seed=0)
    assert data.classes == ["dial", "gauge", "seal"] and data.image_shape == (1, 6, 5) and data.name == "meters"
    assert np.bincount(data.y_test.numpy()).tolist() == [2, 2, 2]  # round(0.4 * 5) per class
    got = {(name, (row * 255).round().astype(np.uint8).tobytes()) for name, row in rows_and_names(data)}
    assert got == {(name, pixels.tobytes()) for name, pixels in stored}
    # bytes over 255 in float32 on both sides: exact
    first = data.x_train[0].numpy()
    assert any(np.array_equal(first, p.reshape(-1).astype(np.float32) / np.float32(255)) for _, p in stored)
    again = datasets.from_folder(root, test_fraction=0.4, seed=0)
    assert torch.equal(again.x_test, data.x_test)  # same seed: exact


def test_one_colour_image_makes_a_three_channel_set(folder):
    root, stored = folder
    colour = np.zeros((6, 5, 3), dtype=np.uint8)
    colour[..., 0], colour[..., 1], colour[..., 2] = 200, 100, 50  # distinct channels catch an HWC/CHW mix-up
    Image.fromarray(colour, mode="RGB").save(root / "seal" / "tinted.png")
    data = datasets.from_folder(root, test_fraction=0.2)
    assert data.image_shape == (3, 6, 5) and data.feature_names[0] == "red 0,0"
    images = {(name, (row * 255).round().astype(np.uint8).reshape(3, 6, 5).tobytes()) for name, row in
              rows_and_names(data)}
    assert ("seal", colour.transpose(2, 0, 1).tobytes()) in images
    name, pixels = stored[0]
    assert (name, np.stack([pixels] * 3).tobytes()) in images  # a greyscale image fills all three channels


def test_size_resizes_every_image_with_pillow_bilinear(folder):
    root, _ = folder
    odd = grey(np.random.default_rng(5), size=(9, 4))
    Image.fromarray(odd, mode="L").save(root / "dial" / "odd.png")
    data = datasets.from_folder(root, size=(3, 4), test_fraction=0.2)
    assert data.image_shape == (1, 3, 4)
    resized = np.asarray(Image.fromarray(odd, mode="L").resize((4, 3), Image.Resampling.BILINEAR))
    got = {(name, (row * 255).round().astype(np.uint8).tobytes()) for name, row in rows_and_names(data)}
    assert ("dial", resized.tobytes()) in got  # the same Pillow call on the same pixels: exact


def test_every_bad_folder_file_is_named(folder, tmp_path):
    root, _ = folder

    def refused(pattern, path=root, **kwargs):
        with pytest.raises(ValueError, match=pattern):
            datasets.from_folder(path, **kwargs)

    note = root / "gauge" / "notes.txt"
    note.write_text("not an image")
    refused(r"gauge/notes.txt is not an image file Pillow can read")
    note.unlink()
    wide = root / "seal" / "wide.png"
    Image.fromarray(grey(np.random.default_rng(1), size=(6, 8)), mode="L").save(wide)
    refused(r"mixed image sizes: .*seal/wide.png is 6x8 \(H x W\) but .*dial/card0.png is 6x5; "
            r"pass size=\(H, W\) to resize them all")
    wide.unlink()
    cut = root / "dial" / "cut.png"
    Image.fromarray(grey(np.random.default_rng(2)), mode="L").save(cut)
    cut.write_bytes(cut.read_bytes()[:-40])  # header intact, compressed pixels cut short
    refused(r"dial/cut.png is a damaged image file")
    cut.unlink()
    deep = Image.fromarray(np.full((6, 5), 40000, dtype=np.uint16))
    deep.save(root / "dial" / "deep.png")
    refused(r"dial/deep.png has Pillow mode 'I;16'; only 8-bit greyscale and colour images are read")
    (root / "dial" / "deep.png").unlink()
    (root / "gauge" / "inner").mkdir()
    refused(r"gauge/inner is a folder inside the class folder .*gauge; from_folder reads one level")
    (root / "gauge" / "inner").rmdir()
    (root / "empty").mkdir()
    refused(r"the class folder .*empty holds no image files")
    lone = tmp_path / "lone"
    (lone / "only").mkdir(parents=True)
    refused(r"lone must hold at least 2 class sub-folders; found 1", lone)
    refused(r"path must be a folder with one sub-folder per class; got .*nowhere', which does not exist",
            tmp_path / "nowhere")
    (root / "empty").rmdir()
    refused(re.escape("size[0] must be an integer >= 1; got 0"), size=(0, 3))
    refused(re.escape("size must be None or a pair (H, W) of integers >= 1; got 28"), size=28)


class FilesOnDisk(torch.utils.data.Dataset):
    """A user's own dataset: PNG files on disk, read with Pillow, returned as CHW float tensors."""

    def __init__(self, files, labels, classes):
        self.files, self.labels, self.classes = files, labels, classes

    def __len__(self):
        return len(self.files)

    def __getitem__(self, k):
        pixels = np.asarray(Image.open(self.files[k]).convert("L"), dtype=np.float32) / 255
        return torch.from_numpy(pixels)[None], self.labels[k]


def test_from_torch_copies_a_dataset_built_from_files(folder):
    root, _ = folder
    files = sorted(root.glob("*/*.png"))
    names = sorted({f.parent.name for f in files})
    labels = [names.index(f.parent.name) for f in files]
    train, test = FilesOnDisk(files[:10], labels[:10], names), FilesOnDisk(files[10:], labels[10:], names)
    data = datasets.from_torch(train, test)
    assert data.image_shape == (1, 6, 5) and data.classes == names and data.name == "FilesOnDisk"
    for k in (0, 9):
        assert torch.equal(data.x_train[k], train[k][0].reshape(-1))  # copies: exact
    assert data.y_test.tolist() == labels[10:]
    assert datasets.from_torch(train, test, classes=["a", "b", "c"]).classes == ["a", "b", "c"]


def test_from_torch_reads_bytes_pillow_images_and_vectors():
    rng = np.random.default_rng(4)
    colour = [(torch.from_numpy(rng.integers(0, 256, size=(3, 4, 4), dtype=np.uint8)), k % 2) for k in range(6)]
    data = datasets.from_torch(colour, colour[:2])
    assert data.image_shape == (3, 4, 4) and data.classes == ["0", "1"]
    assert torch.equal(data.x_train[1], colour[1][0].reshape(-1).float() / 255)  # float32 division both sides
    pillow = [(Image.fromarray(rng.integers(0, 256, size=(4, 5, 3), dtype=np.uint8)), torch.tensor(k % 2))
              for k in range(4)]
    from_pillow = datasets.from_torch(pillow, pillow)
    assert from_pillow.image_shape == (3, 4, 5)
    reference = np.asarray(pillow[2][0]).transpose(2, 0, 1).reshape(-1).astype(np.float32) / np.float32(255)
    np.testing.assert_array_equal(from_pillow.x_train[2].numpy(), reference)
    vectors = [(torch.tensor([3.5 * k, -1.0]), k % 2) for k in range(4)]
    table = datasets.from_torch(vectors, vectors)
    assert table.image_shape is None and table.x_train[3].tolist() == [10.5, -1.0]


def test_every_bad_torch_dataset_is_named():
    good = [(torch.rand(1, 3, 3), k % 2) for k in range(4)]

    def refused(pattern, train, test=good, **kwargs):
        with pytest.raises(ValueError, match=pattern):
            datasets.from_torch(train, test, **kwargs)

    refused(r"train_dataset must be a map-style torch.utils.data.Dataset \(with len\(\) and indexing\); got int", 5)
    refused(r"test_dataset must hold at least one item; got an empty list", good, [])
    refused(r"train_dataset\[0\] must be a pair \(input, label\)", [torch.rand(3)])
    refused(r"train_dataset\[2\] has an input of shape \(1, 3, 4\) but train_dataset\[0\] has \(1, 3, 3\)",
            good[:2] + [(torch.rand(1, 3, 4), 0)])
    normalised = [((torch.rand(1, 3, 3) - 0.5) / 0.25, k % 2) for k in range(4)]
    refused(r"float images in train_dataset and test_dataset must lie in \[0, 1\]", normalised)
    refused(r"test_dataset\[1\] must hold a class label, an integer >= 0; got 0.5", good, [good[0], (good[1][0], 0.5)])
    refused(r"train_dataset\[1\] has an input of dtype uint8 but train_dataset\[0\] has float32",
            [good[0], (torch.zeros(1, 3, 3, dtype=torch.uint8), 1)])
    refused(r"train_dataset\[0\] must hold uint8 or float inputs \(integer images must be uint8\); got dtype int64",
            [(torch.zeros(1, 3, 3, dtype=torch.int64), 0)])
