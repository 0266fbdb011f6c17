"""Refinement from raw text reads the text against the grammar's vocabulary: its read summary
gives the share of tokens the grammar lacks (read as the grammar's unknown word), and warns when
that is most of them.

The grammar and the text are invented here (words of the invented language Velmor)."""

from __future__ import annotations

import json

import pytest

from treewright.decode import decode
from treewright.grammar import load_grammar
from treewright.refine import load_refine_config, refine

GRAMMAR = """@start ROOT
@unknown "<unk>"
ROOT -> S 1.0
S -> A B 1.0
A -> "ta" 0.5
A -> "<unk>" 0.5
B -> "ferro" 0.5
B -> "<unk>" 0.5
"""


def _run(tmp_path, lines: list[str], name: str):
    grammar = tmp_path / "g.pcfg"
    grammar.write_text(GRAMMAR, encoding="utf-8")
    text = tmp_path / f"{name}.txt"
    text.write_text("".join(line + "\n" for line in lines), encoding="utf-8")
    cfg = load_refine_config(None, [
        "data.start=text", f"data.train={text}", f"data.grammar={grammar}",
        "data.heldout_fraction=0.25", "refine.cycles=1", "refine.em_iterations=1",
        "refine.smoothed_iterations=1", "output.tensorboard=false",
        "output.stdout_metrics=false", f"output.run_dir={tmp_path / name}"])
    refine(cfg, tmp_path / name)
    return text, (tmp_path / name / "refine.log").read_text(encoding="utf-8")


def test_the_unknown_rate_is_against_the_grammar_and_most_unknown_warns(tmp_path):
    # Hand-counted: 8 tokens, of which "lanu", "vesk", "lanu", "orun", "dast", "vesk" are not
    # words of GRAMMAR (6 of 8 = 75.00%); its vocabulary is ta, ferro, <unk> (3 types).
    lines = ["ta lanu", "vesk ferro", "lanu orun", "dast vesk"]
    text, log = _run(tmp_path, lines, "most")
    assert "used 4 sentences, 8 tokens" in log
    assert "vocabulary 3 types; unknown-token rate 75.00%" in log
    assert f"warning: 6 of the 8 training tokens of {text} (75.00%) are not words" in log
    # Every sentence still parses: the unknown words are read as <unk>, not dropped.
    metrics = [json.loads(x) for x in (tmp_path / "most" / "metrics.jsonl").read_text()
               .splitlines()]
    assert all(m["train/unparsed"] == 0 for m in metrics)


def test_a_text_mostly_in_the_grammar_gets_no_warning(tmp_path):
    # Hand-counted: 8 tokens, only "vesk" unknown: 1 of 8 = 12.50%.
    lines = ["ta ferro", "ta ferro", "vesk ferro", "ta ferro"]
    _, log = _run(tmp_path, lines, "few")
    assert "unknown-token rate 12.50%" in log
    assert "warning" not in log
    assert "text beyond the training sentences" not in log


def test_the_treebank_start_counts_held_out_words_against_training(tmp_path):
    # Invented trees (Velmor words). Hand-counted with the shape rules of wordshapes.signature
    # (a word longer than 3 letters gets its two-letter ending as a cue; "zo" and "mo" get
    # none) and the defaults rare_count 1 and signature_min_count 3: training words ta (2) and
    # ferro (4) are the grammar's own; molek, varek, dunek (once each) make the class "…ek"
    # (3 rare tokens); zo (once) has no cue and is <unk>. Training: 6 + 3 + 1 of 10 tokens.
    # Held-out: ta, ferro, ferro own; kelek (unseen) and molek (once) "…ek"; mo (unseen) <unk>;
    # kelek and mo are not training words at all: 2 of 6 tokens, 33.33%.
    train = tmp_path / "train.trees"
    train.write_text("(S (N ta) (V ferro))\n(S (N ta) (V ferro))\n(S (N molek) (V ferro))\n"
                     "(S (N varek) (V ferro))\n(S (N dunek) (V zo))\n", encoding="utf-8")
    dev = tmp_path / "dev.trees"
    dev.write_text("(S (N ta) (V ferro))\n(S (N kelek) (V mo))\n(S (N molek) (V ferro))\n",
                   encoding="utf-8")
    cfg = load_refine_config(None, [
        "data.start=treebank", f"data.train={train}", f"data.dev={dev}", "refine.cycles=1",
        "refine.em_iterations=1", "refine.smoothed_iterations=1", "output.tensorboard=false",
        "output.stdout_metrics=false", f"output.run_dir={tmp_path / 'tb'}"])
    refine(cfg, tmp_path / "tb")
    log = (tmp_path / "tb" / "refine.log").read_text(encoding="utf-8")
    held = next(line for line in log.splitlines() if "held-out corpus" in line)
    assert "(vocabulary and unknown tokens: the training corpus's)" in held
    assert "used 3 sentences, 6 tokens" in held and "unknown-token rate 33.33%" in held
    assert ("training tokens read by the grammar: 6 of 10 as words of its own, 3 (30.00%) "
            "as their shape class and 1 (10.00%) as <unk>") in log
    assert ("held-out tokens read by the grammar: 3 of 6 as words of its own, 2 (33.33%) "
            "as their shape class and 1 (16.67%) as <unk>") in log


def test_held_out_words_no_training_sentence_holds_are_read_as_unknown(tmp_path):
    # Invented Velmor text. "ferro" is a word of GRAMMAR, but only the held-out sentence holds
    # it: refinement gives it no probability, the saved grammar drops it, and new text reads it
    # as <unk>. The held-out likelihood reads it so too (hand-counted: 1 of the 2 held-out
    # tokens, 1 type), so the sentence parses, and its log-likelihood is the one the saved
    # grammar gives the same text (`decode`'s log_likelihood, from the grammar file alone).
    grammar = tmp_path / "g.pcfg"
    grammar.write_text(GRAMMAR, encoding="utf-8")
    train, dev = tmp_path / "train.txt", tmp_path / "dev.txt"
    train.write_text("ta lanu\nta vesk\ndast orun\nta orun\n", encoding="utf-8")
    dev.write_text("ta ferro\n", encoding="utf-8")
    cfg = load_refine_config(None, [
        "data.start=text", f"data.train={train}", f"data.dev={dev}", f"data.grammar={grammar}",
        "refine.cycles=1", "refine.em_iterations=2", "refine.smoothed_iterations=1",
        "output.tensorboard=false", "output.stdout_metrics=false",
        f"output.run_dir={tmp_path / 'run'}"])
    refine(cfg, tmp_path / "run")
    log = (tmp_path / "run" / "refine.log").read_text(encoding="utf-8")
    assert ("held-out: 1 of 2 tokens (1 types) are words of the grammar that no training "
            "sentence holds; refinement gives them no probability, so they are read as <unk>"
            ) in log
    # The grammar knew a word that only held-out text holds, so it most likely saw that text.
    assert "held-out: the grammar learned those words from text beyond the training" in log
    # ... so the verdict at the end leaves its cycle 0 out.
    assert "; the last is the best of the cycles from 1 on" in log
    metrics = [json.loads(x) for x in (tmp_path / "run" / "metrics.jsonl").read_text()
               .splitlines()]
    assert [m["heldout/unparsed"] for m in metrics] == [0, 0]
    refined = load_grammar(tmp_path / "run" / "grammar.pcfg")
    assert "ferro" not in refined.vocab
    (decoded,) = decode(refined, [["ta", "ferro"]], "viterbi")
    assert metrics[-1]["heldout/loglik"] == pytest.approx(decoded.log_likelihood, abs=1e-9)
