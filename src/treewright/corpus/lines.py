"""Line-by-line UTF-8 reading that never loads a whole file and never shows a traceback.

Every reader goes through `iter_lines`: it checks the path, tolerates a byte-order mark and mixed
line endings (\\n, \\r\\n and a lone \\r are all line breaks, numbered as an editor would), and turns
bytes that are not UTF-8 into an InputError naming the line and column.
"""

from __future__ import annotations

import os
from typing import Iterator

from treewright.errors import InputError

_BOM = "\ufeff"


def check_readable(path: str | os.PathLike) -> str:
    """The path as a string, or InputError if it is missing, a folder, or unreadable."""
    name = os.fspath(path)
    if not os.path.exists(name):
        raise InputError("no such file", path=name)
    if os.path.isdir(name):
        raise InputError("is a folder, not a corpus file", path=name)
    if not os.access(name, os.R_OK):
        raise InputError("cannot be read (permission denied)", path=name)
    return name


def iter_lines(path: str | os.PathLike) -> Iterator[tuple[int, str]]:
    """Yield (1-based line number, text without its line break) for every line of `path`.

    Raises InputError for a missing path, an empty file, or bytes that are not UTF-8.
    """
    name = check_readable(path)
    if os.path.getsize(name) == 0:
        raise InputError("the file is empty", path=name)
    number = 0
    with open(name, "rb") as handle:
        for raw in handle:  # binary lines end at b"\n" only; a lone \r is split below
            try:
                text = raw.decode("utf-8")
            except UnicodeDecodeError as err:
                before = raw[:err.start]
                line_start = before.rfind(b"\r") + 1  # a lone \r earlier in the chunk
                column = len(before[line_start:].decode("utf-8", errors="replace")) + 1
                raise InputError(f"is not UTF-8 text (byte 0x{raw[err.start]:02x})",
                                 path=name, line=number + 1 + before.count(b"\r"),
                                 column=column) from None
            if number == 0 and text.startswith(_BOM):
                text = text[1:]
            if text.endswith("\n"):
                text = text[:-1]
            if text.endswith("\r"):
                text = text[:-1]
            for piece in text.split("\r"):
                number += 1
                yield number, piece


def iter_word_list(path: str | os.PathLike) -> Iterator[tuple[int, list[str], str]]:
    """(1-based line number, whitespace-separated fields, the line) for every line of a word
    list (`bias.head_list`, `--function-words`) that is neither blank nor a comment (its first
    field starts with #). Raises as `iter_lines`."""
    for number, line in iter_lines(path):
        fields = line.split()
        if fields and not fields[0].startswith("#"):
            yield number, fields, line
