"""Checkpoint files written as streams: the safetensors writer against the library's reader, and atomicity."""

from __future__ import annotations

from pathlib import Path

import pytest
import torch
from safetensors import safe_open
from safetensors.torch import load, load_file, save

from harness.files import atomic_write_stream
from harness.train.checkpoints import write_safetensors


def _tensors() -> dict[str, torch.Tensor]:
    gen = torch.Generator().manual_seed(0)
    return {"layer.weight": torch.randn(7, 5, generator=gen), "layer.bias": torch.randn(5, generator=gen),
            "half": torch.randn(3, 3, generator=gen).to(torch.bfloat16), "steps": torch.arange(4),
            "flags": torch.tensor([True, False, True]), "transposed": torch.randn(4, 6, generator=gen).t()}


def test_streamed_safetensors_read_back_by_the_library_unchanged(tmp_path: Path) -> None:
    # Reference: the safetensors library's own reader (safetensors.torch.load_file, safe_open).
    path = tmp_path / "best.safetensors"
    tensors = _tensors()
    atomic_write_stream(path, lambda fh: write_safetensors(fh, tensors))
    back = load_file(str(path))
    assert set(back) == set(tensors)
    for name, value in tensors.items():
        assert back[name].dtype == value.dtype and back[name].shape == value.shape
        assert torch.equal(back[name], value), name
    with safe_open(str(path), framework="pt") as fh:
        assert set(fh.keys()) == set(tensors)


def test_streamed_file_holds_the_same_data_as_the_librarys_own_writer(tmp_path: Path) -> None:
    tensors = {k: v.contiguous() for k, v in _tensors().items()}
    ours = tmp_path / "ours.safetensors"
    atomic_write_stream(ours, lambda fh: write_safetensors(fh, tensors))
    theirs = load(save(tensors))
    mine = load_file(str(ours))
    assert all(torch.equal(mine[k], theirs[k]) for k in tensors)
    header = int.from_bytes(ours.read_bytes()[:8], "little")
    assert header % 8 == 0  # the specification's alignment of the data that follows
    assert ours.stat().st_size == 8 + header + sum(v.numel() * v.element_size() for v in tensors.values())


def test_a_writer_that_fails_leaves_the_old_file_and_no_temporary(tmp_path: Path) -> None:
    path = tmp_path / "last.pt"
    path.write_bytes(b"old checkpoint")

    def broken(fh: object) -> None:
        fh.write(b"half a new one")  # type: ignore[attr-defined]
        raise RuntimeError("disk full")

    with pytest.raises(RuntimeError, match="disk full"):
        atomic_write_stream(path, broken)
    assert path.read_bytes() == b"old checkpoint"
    assert [p.name for p in tmp_path.iterdir()] == ["last.pt"]
