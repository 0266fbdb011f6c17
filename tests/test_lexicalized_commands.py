"""The lexicalized model through the commands: `parse --heads-out` writes the induced heads as
CoNLL-U, `evaluate` scores that file, and `inspect` and the report list what the model learned
about words.

One tiny run is trained once for the module (60 sentences of the invented head-final language
of scripts/make_headed_language.py, three epochs, small sizes); its gold test file carries the
language's true heads. References: `decode.decode_heads` called directly (the heads), the
`conllu` package reading the written file (the columns kept), `evaluate_attachment` called
directly (the scores), and dense score tables formed by explicit loops (the listed pairs).
"""

from __future__ import annotations

import importlib.util
import json
import math
import sys
from pathlib import Path

import conllu
import pytest
import torch

from treewright.cli import main
from treewright.decode import decode_heads
from treewright.evaluation import BracketConventions
from treewright.evaluation.dependencies import Dependencies, evaluate_attachment
from treewright.induce import load_lexicalized

REPO = Path(__file__).resolve().parents[1]
CONFIG = REPO / "configs" / "lexicalized_demo.yaml"
sys.path.insert(0, str(REPO / "scripts"))
_spec = importlib.util.spec_from_file_location("make_headed_language",
                                               REPO / "scripts" / "make_headed_language.py")
headed = importlib.util.module_from_spec(_spec)
sys.modules.setdefault("make_headed_language", headed)
_spec.loader.exec_module(headed)


@pytest.fixture(scope="module")
def trained(tmp_path_factory):
    """(run folder, folder of the head-final files): a lexicalized run of three epochs."""
    root = tmp_path_factory.mktemp("lexwire")
    headed.write_order("head-final", root, 60, 12, 8, 0)
    data = root / "head-final"
    run = root / "run"
    assert main(["train", str(CONFIG), f"data.train={data / 'train.txt'}", "data.dev=null",
                 "model.nonterminals=3", "model.preterminals=6", "model.head_classes=4",
                 "model.embedding_dim=16", "train.epochs=3", "train.dtype=float64",
                 "optimizer.lr=0.01", "optimizer.warmup_steps=0", f"output.run_dir={run}",
                 "output.progress=false", "output.stdout_metrics=false",
                 "output.tensorboard=false"]) == 0
    return run, data


def _reference_heads(run: Path, sentences: list[list[str]]) -> list[list[int]]:
    # Reference: decode.decode_heads on the model read back from the run, called directly.
    loaded = load_lexicalized(run)
    return [p.heads for p in decode_heads(loaded.model, loaded.vocab, sentences,
                                          loaded.nonterminals, loaded.preterminals)]


def test_parse_writes_the_decoded_heads_into_the_conllu_input(trained, tmp_path, capsys):
    run, data = trained
    gold_path = data / "test.conllu"
    out = tmp_path / "pred.conllu"
    assert main(["parse", str(run), str(gold_path), "--heads-out", str(out)]) == 0
    printed = capsys.readouterr().out.splitlines()
    gold = conllu.parse(gold_path.read_text(encoding="utf-8"))
    pred = conllu.parse(out.read_text(encoding="utf-8"))
    assert len(printed) == len(gold) == len(pred) == 12   # one tree per sentence block, as today
    words = [[t["form"] for t in s] for s in gold]
    heads = [[t["head"] for t in s] for s in pred]
    assert all(h for h in heads)       # the model parses every test sentence (unknown-word token)
    assert heads == _reference_heads(run, words)
    # Reference: the conllu package; every column but HEAD and DEPREL is the input's, and the
    # comments (sent_id, text, tree) are kept.
    for g, p in zip(gold, pred):
        assert p.metadata == g.metadata
        for gt, pt in zip(g, p):
            for column in ("id", "form", "lemma", "upos", "xpos", "feats", "deps", "misc"):
                assert pt[column] == gt[column]
            assert pt["deprel"] == "_"

    # evaluate on the written file gives what evaluate_attachment gives called directly on the
    # same heads and the gold Dependencies (the gold tags mark the final mark as PUNCT).
    scores = tmp_path / "scores.json"
    assert main(["evaluate", str(out), str(gold_path), "--json", str(scores)]) == 0
    got = json.loads(scores.read_text())["attachment"]
    want = evaluate_attachment(
        heads, [Dependencies(tuple(t["form"] for t in s), tuple(t["head"] for t in s),
                             tuple(t["upos"] for t in s)) for s in gold], BracketConventions())
    for system in ("model", "left_chain", "right_chain"):
        assert got["systems"][system]["directed"] == want.systems[system].directed
        assert got["systems"][system]["undirected"] == want.systems[system].undirected
    assert got["systems"]["model"]["words"] == want.systems["model"].words > 0


def test_parse_writes_words_and_heads_from_raw_text(trained, tmp_path):
    run, data = trained
    text = tmp_path / "test.txt"
    lines = (data / "test.txt").read_text(encoding="utf-8").splitlines()
    text.write_text(lines[0] + "\n\n" + "\n".join(lines[1:4]) + "\n", encoding="utf-8")
    out = tmp_path / "pred.conllu"
    assert main(["parse", str(run), str(text), "--heads-out", str(out)]) == 0
    pred = conllu.parse(out.read_text(encoding="utf-8"))
    words = [line.split() for line in lines[:4]]    # the blank line is no sentence
    assert [[t["form"] for t in s] for s in pred] == words
    assert [[t["head"] for t in s] for s in pred] == _reference_heads(run, words)
    # Reference: the CoNLL-U standard's ten columns; ID from 1, everything unknown is `_`.
    for s in pred:
        assert [t["id"] for t in s] == list(range(1, len(s) + 1))
    rows = [line.split("\t") for line in out.read_text(encoding="utf-8").splitlines()
            if line and not line.startswith("#")]
    assert len(rows) == sum(map(len, words))
    assert all(len(r) == 10 and all(r[c] == "_" for c in (2, 3, 4, 5, 7, 8, 9)) for r in rows)


def test_heads_out_refuses_a_model_without_heads(trained, tmp_path, capsys):
    run, data = trained
    out = tmp_path / "pred.conllu"
    for grammar in (REPO / "src/treewright/data/examples/astronomers.pcfg", run / "grammar.pcfg"):
        assert main(["parse", str(grammar), str(data / "test.txt"), "--heads-out",
                     str(out)]) == 1
        err = capsys.readouterr().err
        assert "--heads-out needs a lexicalized model's run folder" in err and str(grammar) in err
        assert not out.exists()
