"""Small pieces shared by the command modules."""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

from treewright.errors import InputError


def read_sentences(path: str) -> list[tuple[int, list[str]]]:
    """(line number, tokens) of every non-blank line of a raw-text file ('-' reads stdin)."""
    if path == "-":
        text = sys.stdin.read()
        name = "<stdin>"
    else:
        name = path
        try:
            text = Path(path).read_bytes().decode("utf-8")
        except FileNotFoundError:
            raise InputError("no such file", path=path) from None
        except UnicodeDecodeError as err:
            line = Path(path).read_bytes()[:err.start].count(b"\n") + 1
            raise InputError("not UTF-8 text", path=path, line=line) from None
    out = [(k, line.split()) for k, line in enumerate(text.lstrip("\ufeff").splitlines(), 1)]
    out = [(k, words) for k, words in out if words]
    if not out:
        raise InputError("no sentences (the input is empty or blank)", path=name)
    return out


def dumps(obj) -> str:
    """JSON with -inf/nan written as null (strict JSON has no infinities)."""
    def clean(x):
        if isinstance(x, float) and not math.isfinite(x):
            return None
        if isinstance(x, dict):
            return {k: clean(v) for k, v in x.items()}
        if isinstance(x, (list, tuple)):
            return [clean(v) for v in x]
        return x
    return json.dumps(clean(obj), ensure_ascii=False)
