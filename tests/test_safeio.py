"""Tests for treewright.safeio: atomic writes, the checkpoint container, run-folder checks.

References: hashlib (the digest stored in the file), struct/json read by hand (the layout the
module docstring promises), torch.equal on bit views (bit-exact round trips), shutil/os for
disk space, and pickle itself to show the malicious file really would run code.
"""

from __future__ import annotations

import errno
import hashlib
import json
import os
import pickle
import struct
import sys

import pytest
import torch

from treewright import safeio
from treewright.errors import InputError
from treewright.safeio import (HEADER_SIZE, MAGIC, atomic_write_bytes, atomic_write_text,
                               check_writable, load_checkpoint, save_checkpoint)


def bits(tensor: torch.Tensor) -> torch.Tensor:
    """The raw bytes of a tensor, so comparisons see NaN payloads and -0.0 exactly."""
    return tensor.contiguous().reshape(-1).view(torch.uint8)


def sample_tensors() -> dict[str, torch.Tensor]:
    generator = torch.Generator().manual_seed(5)
    weights = torch.randn(3, 4, generator=generator)
    weights[0, 0] = float("nan")
    weights[0, 1] = -0.0
    weights[0, 2] = float("-inf")
    return {
        "rule_logits": weights,                                         # float32
        "counts": torch.randn(2, 3, 2, dtype=torch.float64, generator=generator),
        "step": torch.tensor(12345678901234, dtype=torch.int64),        # 0-dim
        "rng_state": torch.get_rng_state(),                             # uint8 torch RNG state
        "empty": torch.zeros(0, 5),
        "mask": torch.tensor([True, False, True]),
        "half": torch.tensor([1.5, -2.25], dtype=torch.bfloat16),
        "strided": torch.arange(12, dtype=torch.int64).reshape(3, 4).t(),  # non-contiguous
    }


META = {"step": 300, "best_f1": 0.4125, "config": {"train": {"lr": 1e-3, "method": "em"},
                                                    "data": {"dev": None}},
        "optimizer": {"kind": "adam", "betas": [0.9, 0.999], "keys": ["m.rule_logits"]},
        "note": "Velmar corpus, harbour dialect \u00e9"}


# --- atomic writes ------------------------------------------------------------------------


def test_atomic_write_creates_and_replaces(tmp_path):
    target = tmp_path / "notes.txt"
    atomic_write_text(target, "first\n")
    assert target.read_text() == "first\n"
    atomic_write_bytes(target, b"\x00second\r\n")
    assert target.read_bytes() == b"\x00second\r\n"   # exact bytes, no newline translation
    assert sorted(p.name for p in tmp_path.iterdir()) == ["notes.txt"]


def test_new_file_permissions_follow_the_umask(tmp_path):
    # Common practice (POSIX open(2)): a new file gets mode 0o666 & ~umask.
    old = os.umask(0o027)
    try:
        atomic_write_text(tmp_path / "a.txt", "x")
    finally:
        os.umask(old)
    assert (tmp_path / "a.txt").stat().st_mode & 0o777 == 0o640


def test_writer_dying_midway_leaves_the_old_file_and_no_temp_file(tmp_path, monkeypatch):
    target = tmp_path / "model.ckpt"
    target.write_bytes(b"old complete content")
    real_write = os.write
    calls = []

    def dying_write(fd, data):
        # Write part of the first piece for real, then fail as a full disk would.
        calls.append(len(data))
        real_write(fd, bytes(data[:3]))
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(safeio.os, "write", dying_write)
    with pytest.raises(OSError):
        atomic_write_bytes(target, b"new content that never fully lands" * 1000)
    monkeypatch.undo()
    assert calls, "the patched write was not reached"
    assert target.read_bytes() == b"old complete content"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["model.ckpt"]


def test_interrupt_midway_also_cleans_up(tmp_path, monkeypatch):
    target = tmp_path / "cfg.yaml"
    target.write_text("seed: 1\n")

    def interrupted_fsync(fd):
        raise KeyboardInterrupt

    monkeypatch.setattr(safeio.os, "fsync", interrupted_fsync)
    with pytest.raises(KeyboardInterrupt):
        atomic_write_text(target, "seed: 2\n")
    monkeypatch.undo()
    assert target.read_text() == "seed: 1\n"
    assert [p.name for p in tmp_path.iterdir()] == ["cfg.yaml"]


def test_short_writes_are_continued(tmp_path, monkeypatch):
    # os.write may write fewer bytes than asked (POSIX write(2)); the rest must follow.
    real_write = os.write
    monkeypatch.setattr(safeio.os, "write", lambda fd, data: real_write(fd, bytes(data[:7])))
    payload = bytes(range(256)) * 10
    atomic_write_bytes(tmp_path / "blob", payload)
    monkeypatch.undo()
    assert (tmp_path / "blob").read_bytes() == payload


# --- checkpoints: round trips and layout --------------------------------------------------


def test_round_trip_is_bit_exact_and_keeps_order(tmp_path):
    path = tmp_path / "run.ckpt"
    tensors = sample_tensors()
    save_checkpoint(path, tensors, META)
    loaded, meta = load_checkpoint(path)
    assert list(loaded) == list(tensors)
    for name, original in tensors.items():
        assert loaded[name].dtype == original.dtype, name
        assert loaded[name].shape == original.shape, name
        assert torch.equal(bits(loaded[name]), bits(original)), name
    assert meta == META
    assert json.dumps(meta, sort_keys=True) == json.dumps(META, sort_keys=True)


def test_rng_state_round_trip_reproduces_the_random_stream(tmp_path):
    # Reference: torch's own generator; restoring the saved state must replay the same draws.
    torch.manual_seed(11)
    torch.rand(3)
    save_checkpoint(tmp_path / "rng.ckpt", {"rng": torch.get_rng_state()}, {})
    expected = torch.rand(5)
    loaded, _ = load_checkpoint(tmp_path / "rng.ckpt")
    torch.set_rng_state(loaded["rng"])
    assert torch.equal(torch.rand(5), expected)


def test_file_layout_matches_the_documented_format(tmp_path):
    path = tmp_path / "layout.ckpt"
    weights = torch.tensor([[1.0, -2.5], [0.25, 3.0]])
    save_checkpoint(path, {"w": weights, "n": torch.tensor([7], dtype=torch.int64)}, {"k": 1})
    data = path.read_bytes()
    magic, version, flags, body_length, digest = struct.unpack_from("<8sIIQ32s", data)
    assert (magic, version, flags, HEADER_SIZE) == (b"\x89TWCKPT\n", 1, 0, 56)
    body = data[HEADER_SIZE:]
    assert body_length == len(body)
    assert digest == hashlib.sha256(body).digest()        # reference: hashlib
    (meta_length,) = struct.unpack_from("<Q", body)
    header = json.loads(body[8: 8 + meta_length])
    assert header["meta"] == {"k": 1} and header["byte_order"] == sys.byteorder
    assert header["tensors"] == [
        {"name": "w", "dtype": "float32", "shape": [2, 2], "offset": 0, "nbytes": 16},
        {"name": "n", "dtype": "int64", "shape": [1], "offset": 16, "nbytes": 8}]
    blob = body[8 + meta_length:]
    # Reference: struct packs the same IEEE-754 / two's-complement little-endian values.
    assert blob == struct.pack("<4fq", 1.0, -2.5, 0.25, 3.0, 7)


def test_unstorable_values_are_refused_before_writing(tmp_path):
    path = tmp_path / "x.ckpt"
    with pytest.raises(TypeError):
        save_checkpoint(path, {}, {"betas": (0.9, 0.99)})      # JSON would return a list
    with pytest.raises(TypeError):
        save_checkpoint(path, {}, {1: "int key"})              # JSON would return "1"
    with pytest.raises(TypeError):
        save_checkpoint(path, {"w": [1.0]}, {})
    with pytest.raises(ValueError):
        save_checkpoint(path, {"w": torch.zeros(2, dtype=torch.complex64)}, {})
    assert not path.exists()


# --- checkpoints: refusing bad files ------------------------------------------------------


class WritesMarker:
    """Unpickling this object runs code that creates a marker file."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (exec, (f"import pathlib; pathlib.Path({self.marker!r}).write_text('code ran')",))


def test_pickle_payload_files_are_refused_and_run_no_code(tmp_path):
    marker = tmp_path / "marker"
    payload = pickle.dumps({"weights": WritesMarker(marker)})
    # Show the payload is live: plain unpickling does create the marker.
    pickle.loads(payload)
    assert marker.exists()
    marker.unlink()

    raw_pickle = tmp_path / "raw.pkl"
    raw_pickle.write_bytes(payload)
    torch_file = tmp_path / "torch.pt"
    torch.save({"weights": WritesMarker(marker)}, torch_file)
    # Our own header and a valid digest around a pickle body: still only parsed as JSON.
    body = struct.pack("<Q", len(payload)) + payload
    disguised = tmp_path / "disguised.ckpt"
    disguised.write_bytes(struct.pack("<8sIIQ32s", MAGIC, 1, 0, len(body),
                                      hashlib.sha256(body).digest()) + body)

    for path, reason in [(raw_pickle, "wrong magic"), (torch_file, "wrong magic"),
                         (disguised, "malformed")]:
        with pytest.raises(InputError) as info:
            load_checkpoint(path)
        assert info.value.path == str(path) and reason in str(info.value)
    assert not marker.exists()


def test_every_truncation_is_refused(tmp_path):
    path = tmp_path / "t.ckpt"
    save_checkpoint(path, {"w": torch.arange(6, dtype=torch.float32)}, {"step": 1})
    data = path.read_bytes()
    cut_path = tmp_path / "cut.ckpt"
    for length in range(len(data)):
        cut_path.write_bytes(data[:length])
        with pytest.raises(InputError) as info:
            load_checkpoint(cut_path)
        message = str(info.value)
        assert message.startswith(str(cut_path))
        assert ("truncated" in message) or ("magic" in message), (length, message)


def test_every_single_bit_flip_is_refused(tmp_path):
    # Brute force over every bit of a small checkpoint: each edit must be caught.
    path = tmp_path / "b.ckpt"
    save_checkpoint(path, {"w": torch.tensor([0.5, -1.0]), "s": torch.tensor(3)}, {"a": [1]})
    data = bytearray(path.read_bytes())
    flipped_path = tmp_path / "flipped.ckpt"
    for bit in range(len(data) * 8):
        flipped = bytearray(data)
        flipped[bit // 8] ^= 1 << (bit % 8)
        flipped_path.write_bytes(flipped)
        with pytest.raises(InputError):
            load_checkpoint(flipped_path)
    flipped_path.write_bytes(data)
    assert load_checkpoint(flipped_path)[1] == {"a": [1]}


def test_specific_damage_gets_a_specific_message(tmp_path):
    path = tmp_path / "d.ckpt"
    save_checkpoint(path, {"w": torch.ones(4)}, {})
    data = path.read_bytes()
    cases = {
        "edited in the tensor bytes": (data[:-1] + bytes([data[-1] ^ 0xFF]), "SHA-256"),
        "extra bytes appended": (data + b"\x00", "unexpected bytes"),
        "newer format version": (data[:8] + struct.pack("<I", 2) + data[12:], "version 2"),
        "not a checkpoint": (b"seed: 1\n", "wrong magic"),
    }
    for label, (content, expected) in cases.items():
        path.write_bytes(content)
        with pytest.raises(InputError, match=expected):
            load_checkpoint(path)
    with pytest.raises(InputError, match="not found"):
        load_checkpoint(tmp_path / "absent.ckpt")


def test_valid_digest_over_inconsistent_layout_is_refused(tmp_path):
    # Written by other code with a correct digest, but the tensor table lies about sizes.
    table = {"byte_order": sys.byteorder, "meta": {},
             "tensors": [{"name": "w", "dtype": "float32", "shape": [4], "offset": 0,
                          "nbytes": 16}]}
    meta_json = json.dumps(table).encode()
    body = struct.pack("<Q", len(meta_json)) + meta_json + b"\x00" * 8   # only 8 of 16 bytes
    path = tmp_path / "liar.ckpt"
    path.write_bytes(struct.pack("<8sIIQ32s", MAGIC, 1, 0, len(body),
                                 hashlib.sha256(body).digest()) + body)
    with pytest.raises(InputError, match="runs past the end"):
        load_checkpoint(path)


# --- run folders --------------------------------------------------------------------------


def test_check_writable_creates_the_folder_and_leaves_nothing_behind(tmp_path):
    folder = tmp_path / "runs" / "velmar-1"
    assert check_writable(folder, min_free_bytes=0) == folder
    assert folder.is_dir() and list(folder.iterdir()) == []


def test_check_writable_refuses_a_file_in_the_way(tmp_path):
    blocker = tmp_path / "runs"
    blocker.write_text("not a folder")
    with pytest.raises(InputError) as info:
        check_writable(blocker / "velmar-1", min_free_bytes=0)
    assert str(blocker) in str(info.value)
    with pytest.raises(InputError, match="file of that name"):
        check_writable(blocker, min_free_bytes=0)


def test_check_writable_reports_low_disk_space(tmp_path):
    # Reference: statvfs, independent of shutil.disk_usage (blocks free to unprivileged users).
    stats = os.statvfs(tmp_path)
    free = stats.f_bavail * stats.f_frsize
    check_writable(tmp_path, min_free_bytes=free // 2)
    with pytest.raises(InputError, match="MiB free") as info:
        check_writable(tmp_path, min_free_bytes=free * 4 + 2**30)
    assert info.value.path == str(tmp_path)


def test_check_writable_reports_a_folder_it_cannot_write(tmp_path, monkeypatch):
    # Root ignores permission bits, so the refusal from the OS is simulated at os.open.
    def refuse(*args, **kwargs):
        raise PermissionError(errno.EACCES, "Permission denied")

    monkeypatch.setattr(safeio.os, "open", refuse)
    with pytest.raises(InputError, match="cannot write in the run folder: Permission denied"):
        check_writable(tmp_path, min_free_bytes=0)
