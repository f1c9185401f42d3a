"""Save/load round trips and every kind of bad file: nothing is ever unpickled."""
import json
import os
import pickle
import struct

import pytest
import torch
from torch import nn

import jostle
from jostle import Ensemble, FormatError
from tests.conftest import random_mlp_ensemble


class Custom(nn.Module):
    def __init__(self):
        super().__init__()
        self.a = nn.Linear(2, 3)
        self.b = nn.Linear(3, 2)

    def forward(self, x):
        return self.b(torch.sin(self.a(x)))


def test_round_trip_keeps_outputs_and_metadata(tmp_path):
    ens, _ = random_mlp_ensemble(members=4)
    ens.meta.update(classes=["steady", "leak", "unknown"], method="deep_ensemble", bounds=[[-3, -3], [3, 3]])
    path = tmp_path / "post.safetensors"
    ens.save(path)
    back = jostle.load(path)
    x = torch.randn(6, 2)
    # the parameters read back are a bit copy, so the same kernel gives the same floats
    torch.testing.assert_close(back.logits(x), ens.logits(x), atol=0, rtol=0)
    assert back.classes == ["steady", "leak", "unknown"]
    assert back.meta["method"] == "deep_ensemble"
    assert back.meta["architecture"]["builder"] == "mlp"
    assert [p.name for p in tmp_path.iterdir()] == ["post.safetensors"]  # no temp file left


def test_custom_architecture_needs_module(tmp_path):
    ens = Ensemble.from_modules([Custom(), Custom()])
    path = tmp_path / "custom.safetensors"
    ens.save(path)
    with pytest.raises(FormatError, match="holds a custom architecture; pass the module it was made from as module="):
        jostle.load(path)
    back = jostle.load(path, module=Custom())
    x = torch.randn(3, 2)
    torch.testing.assert_close(back.logits(x), ens.logits(x))


def test_mismatched_architecture_is_refused(tmp_path):
    ens, _ = random_mlp_ensemble(members=2, hidden=(8, 8))
    path = tmp_path / "post.safetensors"
    ens.save(path)
    with pytest.raises(FormatError, match=r"architecture mismatch: .* has '0.weight' of shape \(8, 2\) per member, "
                                          r"the module has \(16, 2\)"):
        jostle.load(path, module=jostle.mlp(2, 3, hidden=(16, 8)))
    with pytest.raises(FormatError, match="architecture mismatch"):
        jostle.load(path, module=Custom())


def test_truncated_and_corrupted_files(tmp_path):
    ens, _ = random_mlp_ensemble(members=2)
    good = tmp_path / "good.safetensors"
    ens.save(good)
    raw = good.read_bytes()
    cut = tmp_path / "cut.safetensors"
    cut.write_bytes(raw[: len(raw) - 40])
    with pytest.raises(FormatError, match="truncated or corrupted"):
        jostle.load(cut)
    stub = tmp_path / "stub.safetensors"
    stub.write_bytes(raw[:5])
    with pytest.raises(FormatError, match="shorter than a safetensors header"):
        jostle.load(stub)
    header_cut = tmp_path / "header.safetensors"
    header_cut.write_bytes(raw[:30])
    with pytest.raises(FormatError, match="header says"):
        jostle.load(header_cut)
    garbage = tmp_path / "garbage.safetensors"
    garbage.write_bytes(struct.pack("<Q", 10) + b"not json!!" + b"\x00" * 16)
    with pytest.raises(FormatError, match="no readable jostle metadata"):
        jostle.load(garbage)


def test_unknown_format_version(tmp_path):
    ens, _ = random_mlp_ensemble(members=2)
    path = tmp_path / "post.safetensors"
    ens.save(path)
    raw = path.read_bytes()
    (length,) = struct.unpack("<Q", raw[:8])
    table = json.loads(raw[8:8 + length])
    inner = json.loads(table["__metadata__"]["jostle"])
    inner["format_version"] = 99
    table["__metadata__"]["jostle"] = json.dumps(inner)
    new_header = json.dumps(table).encode()
    new_header += b" " * (-len(new_header) % 8)
    path.write_bytes(struct.pack("<Q", len(new_header)) + new_header + raw[8 + length:])
    with pytest.raises(FormatError, match="has format_version 99; this jostle reads version 1"):
        jostle.load(path)


class _Boom:
    """Unpickling this would run code: the loader must never get that far."""

    def __reduce__(self):
        return (os.system, ("echo unpickled > /dev/null",))


def test_pickles_are_never_unpickled(tmp_path):
    evil = tmp_path / "evil.safetensors"
    evil.write_bytes(pickle.dumps(_Boom()))
    with pytest.raises(FormatError, match="is a Python pickle, not safetensors; jostle never unpickles files"):
        jostle.load(evil)
    zipped = tmp_path / "torchsave.safetensors"
    torch.save({"w": torch.zeros(2)}, zipped)
    with pytest.raises(FormatError, match=r"zip archive \(torch.save output\)"):
        jostle.load(zipped)


def test_foreign_safetensors_file(tmp_path):
    from safetensors.torch import save_file

    path = tmp_path / "other.safetensors"
    save_file({"w": torch.zeros(2)}, path)
    with pytest.raises(FormatError, match="not a jostle posterior"):
        jostle.load(path)


def test_write_is_atomic(tmp_path, monkeypatch):
    ens, _ = random_mlp_ensemble(members=2)
    path = tmp_path / "post.safetensors"
    ens.save(path)
    before = path.read_bytes()

    def failing_replace(src, dst):
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", failing_replace)
    other, _ = random_mlp_ensemble(members=3, seed=9)
    with pytest.raises(OSError, match="disk full"):
        other.save(path)
    assert path.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir()] == ["post.safetensors"]


def test_saved_file_gets_an_ordinary_files_mode(tmp_path):
    # POSIX: a new file's mode is 0o666 less the umask (common practice); the temporary file
    # behind the atomic rename is 0o600, which must not leak into the saved file.
    ens, _ = random_mlp_ensemble(members=2)
    umask = os.umask(0o022)
    os.umask(umask)
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    path = tmp_path / "post.safetensors"
    ens.save(path)
    assert path.stat().st_mode & 0o777 == plain.stat().st_mode & 0o777 == 0o666 & ~umask
    os.chmod(path, 0o640)
    ens.save(path)  # an existing file keeps its mode
    assert path.stat().st_mode & 0o777 == 0o640


def test_save_path_and_missing_file_errors(tmp_path):
    ens, _ = random_mlp_ensemble(members=2)
    with pytest.raises(ValueError, match=r"path must end in .safetensors; got '.*post.pt'"):
        ens.save(tmp_path / "post.pt")
    with pytest.raises(FileNotFoundError, match="path does not exist"):
        jostle.load(tmp_path / "absent.safetensors")
    ens.meta["bad"] = object()
    with pytest.raises(TypeError, match="metadata must be JSON-serialisable; got object"):
        ens.save(tmp_path / "post.safetensors")
