"""Help texts say what the commands do: checked against what the commands accept."""

from __future__ import annotations

import io
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

from _cli import cli
from treewright.cli import COMMANDS, main

REPO = Path(__file__).resolve().parents[1]
ASTRONOMERS = REPO / "src/treewright/data/examples/astronomers.pcfg"


def test_validate_and_report_summaries_name_every_run_kind_they_take():
    # Reference: the shipped configs of each kind, which `validate` accepts, and the kinds
    # README's commands table lists for `validate` and `report` (train, refine, segment).
    for config in ("em_demo.yaml", "refine_demo_treebank.yaml", "segment_words.yaml"):
        code, _, _ = cli("validate", REPO / "configs" / config)
        assert code == 0, config
    for command in ("validate", "report"):
        summary = COMMANDS[command][1]
        for kind in ("train", "refine", "segment"):
            assert kind in summary, (command, summary)


def test_inspect_corpus_reads_each_tree_as_one_sentence_as_its_help_says(tmp_path):
    # Reference: the same two sentences as raw text, one per line (the reading the help
    # named before); a bracketed file spread over lines must give the same expected counts.
    text = tmp_path / "sentences.txt"
    text.write_text("astronomers saw stars with ears\nastronomers saw ears\n")
    trees = tmp_path / "sentences.trees"
    trees.write_text("(S (NP astronomers)\n   (VP (V saw) (NP (NP stars) (PP (P with) "
                     "(NP ears)))))\n(S (NP astronomers) (VP (V saw) (NP ears)))\n")
    code_text, out_text, _ = cli("inspect", ASTRONOMERS, "--corpus", text)
    code_trees, out_trees, _ = cli("inspect", ASTRONOMERS, "--corpus", trees)
    assert code_text == code_trees == 0
    assert "expected counts over 2 sentences" in out_trees
    assert out_trees.replace(str(trees), "FILE") == out_text.replace(str(text), "FILE")
    code, out, _ = _help("inspect")
    assert code == 0
    corpus_help = out.split("--corpus CORPUS", 2)[2].split("--symbol")[0]
    assert "tree" in corpus_help and "CoNLL-U" in corpus_help


def _help(command):
    """`treewright COMMAND --help`: exit code, standard output and standard error."""
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        try:
            main([command, "--help"])
        except SystemExit as done:
            return done.code, out.getvalue(), err.getvalue()
    return 0, out.getvalue(), err.getvalue()
