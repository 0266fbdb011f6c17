"""Files that are never half-written and never run code when read.

`atomic_write_bytes` / `atomic_write_text` replace a file in one step, so a crash leaves either
the old file or the new one. Checkpoints use a container of our own instead of pickle, so
loading one is only parsing: JSON plus raw tensor bytes, checked by a SHA-256 digest.

Checkpoint layout (format version 1; integers little-endian)::

    offset  size  field
    0       8     magic bytes b"\\x89TWCKPT\\n"
    8       4     format version (uint32)
    12      4     flags (uint32, must be 0)
    16      8     body length in bytes (uint64)
    24      32    SHA-256 of the body
    56      ...   body: metadata length (uint64), metadata JSON (UTF-8), tensor bytes

The metadata JSON is an object: "byte_order" of the tensor bytes, "tensors" (a list of
{"name", "dtype", "shape", "offset", "nbytes"}, with offsets counted from the start of the
tensor bytes, laid end to end in list order) and "meta" (the caller's JSON data). The digest
covers the whole body, so every field a reader trusts is either checked against it or against
the file's size.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import secrets
import shutil
import struct
import sys
from pathlib import Path
from typing import Any, Mapping

import torch

from treewright.errors import InputError

MAGIC = b"\x89TWCKPT\n"
FORMAT_VERSION = 1
# magic, version, flags, body length, SHA-256 of the body.
_HEADER = struct.Struct("<8sIIQ32s")
HEADER_SIZE = _HEADER.size  # 56
_META_LENGTH = struct.Struct("<Q")

# Element types a checkpoint can hold, by the name written in the file.
_DTYPES: dict[str, torch.dtype] = {
    "float16": torch.float16, "bfloat16": torch.bfloat16, "float32": torch.float32,
    "float64": torch.float64, "int8": torch.int8, "int16": torch.int16, "int32": torch.int32,
    "int64": torch.int64, "uint8": torch.uint8, "bool": torch.bool,
}
_DTYPE_NAMES = {dtype: name for name, dtype in _DTYPES.items()}

# Large writes go out in pieces so a short write (full disk, signal) is noticed and retried.
_WRITE_CHUNK = 1 << 20


# ---------------------------------------------------------------------------------------------
# Atomic writes


def atomic_write_bytes(path: str | Path, data: bytes) -> None:
    """Replace the file at `path` with `data` in one step.

    The bytes go to a temporary file in the same folder (so the final rename stays on one file
    system), are flushed and fsync'ed, and the temporary file is renamed over `path` with
    os.replace; then the folder itself is fsync'ed so the rename survives a power cut. If
    anything fails, the temporary file is removed and the old file at `path` is untouched.
    The new file gets the usual permissions for new files (0o666 less the umask).
    """
    path = Path(path)
    temp = path.with_name(f".{path.name}.{secrets.token_hex(6)}.tmp")
    fd = os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | getattr(os, "O_BINARY", 0), 0o666)
    try:
        try:
            view = memoryview(data)
            while view:
                written = os.write(fd, view[:_WRITE_CHUNK])
                view = view[written:]
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(temp, path)
    except BaseException:
        # Also on KeyboardInterrupt: a stray temp file next to a checkpoint confuses people.
        temp.unlink(missing_ok=True)
        raise
    _fsync_folder(path.parent)


def atomic_write_text(path: str | Path, text: str, encoding: str = "utf-8") -> None:
    """`atomic_write_bytes` for text; newlines are written as given (no translation)."""
    atomic_write_bytes(path, text.encode(encoding))


def write_output_text(path: str | Path, text: str, encoding: str = "utf-8") -> Path:
    """`atomic_write_text` to a file the user named: its folder is created when missing, and a
    folder that cannot be made or a file that cannot be written raises InputError naming the
    path (not an OSError traceback). Returns the path."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
    except OSError as err:
        raise InputError(f"cannot create the output folder {path.parent}: "
                         f"{err.strerror or 'a file of that name exists'}",
                         path=str(path)) from None
    try:
        atomic_write_text(path, text, encoding)
    except IsADirectoryError:
        raise InputError("cannot write the output: it is a folder", path=str(path)) from None
    except OSError as err:
        raise InputError(f"cannot write the output: {err.strerror}", path=str(path)) from None
    return path


def _fsync_folder(folder: Path) -> None:
    # Folders cannot be opened for fsync on Windows; there the rename is as durable as it gets.
    if os.name != "posix":
        return
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


# ---------------------------------------------------------------------------------------------
# Checkpoints


def save_checkpoint(path: str | Path, tensors: Mapping[str, torch.Tensor],
                    meta: Mapping[str, Any] | None = None) -> None:
    """Write `tensors` (name -> dense CPU-copyable tensor of a dtype in `_DTYPES`) and `meta`
    (JSON data: dicts with string keys, lists, str, int, float, bool, None) to `path`,
    atomically. Tensors are stored bit-exactly in order; `load_checkpoint` reads them back.

    Raises TypeError / ValueError for values that cannot be stored exactly (for example a
    tuple, which JSON would turn into a list, or a sparse tensor).
    """
    meta = {} if meta is None else dict(meta)
    _check_json(meta, "meta")
    entries = []
    blobs = []
    offset = 0
    for name, tensor in tensors.items():
        if not isinstance(name, str):
            raise TypeError(f"tensor names must be strings, not {name!r}")
        if not isinstance(tensor, torch.Tensor):
            raise TypeError(f"tensors[{name!r}] is a {type(tensor).__name__}, not a tensor")
        if tensor.layout != torch.strided or tensor.dtype not in _DTYPE_NAMES:
            raise ValueError(f"tensors[{name!r}] has layout {tensor.layout} and dtype "
                             f"{tensor.dtype}; a checkpoint stores dense tensors of "
                             f"{', '.join(_DTYPES)}")
        flat = tensor.detach().cpu().contiguous().reshape(-1)
        # Viewing as bytes keeps the exact bit pattern (NaN payloads, -0.0) of every element.
        raw = flat.view(torch.uint8).numpy().tobytes() if flat.numel() else b""
        entries.append({"name": name, "dtype": _DTYPE_NAMES[tensor.dtype],
                        "shape": list(tensor.shape), "offset": offset, "nbytes": len(raw)})
        blobs.append(raw)
        offset += len(raw)
    header_json = json.dumps({"byte_order": sys.byteorder, "tensors": entries, "meta": meta},
                             ensure_ascii=False, separators=(",", ":")).encode("utf-8")
    body = b"".join([_META_LENGTH.pack(len(header_json)), header_json, *blobs])
    header = _HEADER.pack(MAGIC, FORMAT_VERSION, 0, len(body), hashlib.sha256(body).digest())
    atomic_write_bytes(path, header + body)


def load_checkpoint(path: str | Path) -> tuple[dict[str, torch.Tensor], dict[str, Any]]:
    """Read a file written by `save_checkpoint`: (tensors in saved order, meta).

    Only parses: no pickle, no code. Raises InputError naming the file and what is wrong when
    it is not a checkpoint (wrong magic bytes, for example a pickle or torch.save file), has
    an unknown format version, is truncated or has extra bytes, fails its checksum (edited or
    damaged), or has malformed metadata.
    """
    where = str(path)
    try:
        data = Path(path).read_bytes()
    except FileNotFoundError:
        raise InputError("checkpoint file not found", path=where) from None
    except OSError as err:
        raise InputError(f"cannot read checkpoint: {err.strerror}", path=where) from None

    if len(data) < len(MAGIC) or data[: len(MAGIC)] != MAGIC:
        raise InputError("not a treewright checkpoint (wrong magic bytes at the start; "
                         "pickle and torch.save files are never loaded)", path=where)
    if len(data) < HEADER_SIZE:
        raise InputError(f"checkpoint is truncated: {len(data)} bytes, shorter than its "
                         f"{HEADER_SIZE}-byte header", path=where)
    _, version, flags, body_length, digest = _HEADER.unpack_from(data)
    if version != FORMAT_VERSION:
        raise InputError(f"checkpoint format version {version} is not supported (this "
                         f"treewright reads version {FORMAT_VERSION})", path=where)
    if flags != 0:
        raise InputError(f"checkpoint header has unknown flags {flags:#x}", path=where)
    expected = HEADER_SIZE + body_length
    if len(data) < expected:
        raise InputError(f"checkpoint is truncated: its header promises {expected} bytes, the "
                         f"file has {len(data)}", path=where)
    if len(data) > expected:
        raise InputError(f"checkpoint has {len(data) - expected} unexpected bytes after its "
                         f"end (header says {expected} bytes)", path=where)
    body = memoryview(data)[HEADER_SIZE:]
    if hashlib.sha256(body).digest() != digest:
        raise InputError("checkpoint failed its SHA-256 check: the file was edited or damaged",
                         path=where)
    return _parse_body(body, where)


def _parse_body(body: memoryview, where: str) -> tuple[dict[str, torch.Tensor], dict[str, Any]]:
    """Tensors and meta from a checksum-verified body. The checks still matter: a file can be
    written by other code with a valid digest over nonsense."""
    def bad(reason: str) -> InputError:
        return InputError(f"checkpoint metadata is malformed: {reason}", path=where)

    if len(body) < _META_LENGTH.size:
        raise bad("body is too short for its length field")
    (meta_length,) = _META_LENGTH.unpack_from(body)
    start = _META_LENGTH.size
    if meta_length > len(body) - start:
        raise bad(f"metadata length {meta_length} runs past the end of the file")
    try:
        header = json.loads(bytes(body[start: start + meta_length]).decode("utf-8"))
    except (UnicodeDecodeError, json.JSONDecodeError) as err:
        raise bad(f"not JSON ({err})") from None
    if not isinstance(header, dict) or set(header) != {"byte_order", "tensors", "meta"}:
        raise bad("expected an object with keys byte_order, tensors and meta")
    if header["byte_order"] != sys.byteorder:
        raise InputError(f"checkpoint holds {header['byte_order']}-endian tensors; this "
                         f"machine is {sys.byteorder}-endian", path=where)
    if not isinstance(header["meta"], dict) or not isinstance(header["tensors"], list):
        raise bad("meta must be an object and tensors a list")
    blob = body[start + meta_length:]
    tensors: dict[str, torch.Tensor] = {}
    offset = 0
    for index, entry in enumerate(header["tensors"]):
        if not isinstance(entry, dict) or set(entry) != {"name", "dtype", "shape", "offset",
                                                         "nbytes"}:
            raise bad(f"tensor entry {index} does not have name, dtype, shape, offset, nbytes")
        name, dtype_name, shape = entry["name"], entry["dtype"], entry["shape"]
        if not isinstance(name, str) or name in tensors:
            raise bad(f"tensor entry {index} has a bad or repeated name {name!r}")
        if dtype_name not in _DTYPES:
            raise bad(f"tensor {name!r} has unknown dtype {dtype_name!r}")
        if not isinstance(shape, list) or not all(
                isinstance(n, int) and not isinstance(n, bool) and n >= 0 for n in shape):
            raise bad(f"tensor {name!r} has a bad shape {shape!r}")
        dtype = _DTYPES[dtype_name]
        nbytes = math.prod(shape) * dtype.itemsize
        if entry["offset"] != offset or entry["nbytes"] != nbytes:
            raise bad(f"tensor {name!r} does not sit where the layout puts it")
        if offset + nbytes > len(blob):
            raise bad(f"tensor {name!r} runs past the end of the file")
        if nbytes:
            # bytearray gives a fresh, writable, aligned buffer that the tensor then owns.
            raw = bytearray(blob[offset: offset + nbytes])
            tensors[name] = torch.frombuffer(raw, dtype=torch.uint8).view(dtype).reshape(shape)
        else:
            tensors[name] = torch.empty(shape, dtype=dtype)
        offset += nbytes
    if offset != len(blob):
        raise bad(f"{len(blob) - offset} bytes of tensor data belong to no tensor")
    return tensors, header["meta"]


def _check_json(value: Any, where: str) -> None:
    """Refuse data that JSON would not give back unchanged (tuples, non-string keys, objects)."""
    if value is None or isinstance(value, (bool, int, float, str)):
        return
    if isinstance(value, list):
        for index, item in enumerate(value):
            _check_json(item, f"{where}[{index}]")
        return
    if isinstance(value, dict):
        for key, item in value.items():
            if not isinstance(key, str):
                raise TypeError(f"{where} has a non-string key {key!r}; JSON keys are strings")
            _check_json(item, f"{where}[{key!r}]")
        return
    raise TypeError(f"{where} is a {type(value).__name__}, which JSON cannot store exactly; "
                    f"use dicts, lists, str, int, float, bool or None (tensors go in `tensors`)")


# ---------------------------------------------------------------------------------------------
# Run folders


def check_writable(folder: str | Path, min_free_bytes: int = 100 * 2**20) -> Path:
    """Make sure `folder` exists (creating it and its parents) and a file can be written in it,
    and that at least `min_free_bytes` are free on its disk (default 100 MiB). Returns the
    folder. Meant to run before long work, so a bad run folder fails at once, not hours later.

    Raises InputError naming the folder and the reason.
    """
    folder = Path(folder)
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except FileExistsError:
        raise InputError("cannot use as a run folder: a file of that name exists",
                         path=str(folder)) from None
    except OSError as err:
        raise InputError(f"cannot create the run folder: {err.strerror}",
                         path=str(folder)) from None
    if not folder.is_dir():
        raise InputError("cannot use as a run folder: it is not a folder", path=str(folder))
    probe = folder / f".write-check-{secrets.token_hex(6)}"
    try:
        atomic_write_bytes(probe, b"treewright write check\n")
        probe.unlink()
    except OSError as err:
        raise InputError(f"cannot write in the run folder: {err.strerror}",
                         path=str(folder)) from None
    free = shutil.disk_usage(folder).free
    if free < min_free_bytes:
        raise InputError(f"only {_mebibytes(free)} free on the disk of the run folder; at least "
                         f"{_mebibytes(min_free_bytes)} are needed", path=str(folder))
    return folder


def _mebibytes(count: int) -> str:
    return f"{count / 2**20:.1f} MiB"
