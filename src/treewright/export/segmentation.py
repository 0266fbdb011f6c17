"""The outputs of a segmentation run (`treewright segment`) in one JSON file, and the reading
of its lexicon.tsv.

JSON fields: `format` ("treewright segmentation") and `version` (1); `unit` ("words" or
"morphs"); `input` (the file the run read) and `sweeps` (those done); `pooled_analyses` (how
many recorded analyses the segmentation pooled; 0: the reported chain's last state);
`segmentation` (one list of units per input, in the order of segmentation.txt); `lexicon` (per
cached unit of the reported chain: `symbol`, `unit`, `customers`, `tables`, most used first
within each symbol).
"""

from __future__ import annotations

import json
from pathlib import Path

import yaml

from treewright.errors import InputError
from treewright.runfolder import RunFolder

FORMAT = "treewright segmentation"
VERSION = 1


def read_lexicon(path: str | Path) -> list[tuple[str, str, int, int]]:
    """(symbol, unit, customers, tables) per line of a run's lexicon.tsv; a word run's lines
    have no symbol column, and their symbol is Word."""
    out = []
    for number, line in enumerate(Path(path).read_text(encoding="utf-8").splitlines(), 1):
        cells = line.split("\t")
        if len(cells) == 3:
            cells = ["Word", *cells]
        try:
            symbol, text, customers, tables = cells
            out.append((symbol, text, int(customers), int(tables)))
        except ValueError:
            raise InputError("expected unit, customers and tables (after the symbol, for "
                             "morphs), separated by tabs", path=str(path), line=number) from None
    return out


def checkpoint_progress(folder: RunFolder) -> tuple[int, int]:
    """(sweeps done, analyses the segmentation pools) from a segment run's checkpoint."""
    try:
        state = json.loads(folder.checkpoint.read_text(encoding="utf-8"))
        return state["chains"]["chains"][0]["sweeps"], state.get("boundaries", {}).get(
            "samples", 0)
    except (json.JSONDecodeError, UnicodeDecodeError, AttributeError, KeyError, IndexError,
            TypeError):
        raise InputError("not a checkpoint of a segmentation run",
                         path=str(folder.checkpoint)) from None


def segmentation_json_text(run_dir: str | Path) -> str:
    """The JSON export of the finished segmentation run in `run_dir`."""
    folder = RunFolder(run_dir, "segment")
    for path in (folder.config, folder.segmentation, folder.lexicon, folder.checkpoint):
        if not path.is_file():
            raise InputError(f"no {path.name}: not a finished segmentation run",
                             path=str(folder.path))
    sweeps, pooled = checkpoint_progress(folder)
    try:
        config = yaml.safe_load(folder.config.read_text(encoding="utf-8"))
        unit = config.get("grammar", {}).get("unit", "words")
        source = config["data"]["text"]
    except (yaml.YAMLError, UnicodeDecodeError, AttributeError, KeyError, TypeError):
        raise InputError("the config of this segmentation run cannot be read",
                         path=str(folder.config)) from None
    segmentation = [line.split() for line in
                    folder.segmentation.read_text(encoding="utf-8").splitlines()]
    lexicon = [{"symbol": s, "unit": t, "customers": c, "tables": k}
               for s, t, c, k in read_lexicon(folder.lexicon)]
    head = {"format": FORMAT, "version": VERSION, "unit": unit, "input": str(source),
            "sweeps": sweeps, "pooled_analyses": pooled}
    lines = [f" {json.dumps(k)}: {json.dumps(v, ensure_ascii=False)}," for k, v in head.items()]

    def rows(name: str, items: list, last: bool) -> list[str]:  # one item a line
        body = [f"  {json.dumps(x, ensure_ascii=False)}" for x in items]
        return [f' "{name}": [', ",\n".join(body), " ]" + ("" if last else ",")]

    return "\n".join(["{", *lines, *rows("segmentation", segmentation, False),
                      *rows("lexicon", lexicon, True), "}"]) + "\n"
