"""Export formats: text and JSON round trips, JSON validation, listing, parsed corpora, pruning
and renaming. Toy data: a grammar of the invented harbour language of Velmar."""

from __future__ import annotations

import io
import json
import math
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import conllu
import pytest
import torch

from treewright.cli import main
from treewright.errors import InputError
from treewright.export import (expected_counts, grammar_to_json, head_rule, iter_rules,
                               load, load_grammar_json, open_grammar, parse_corpus, prune,
                               rename_grammar, save_grammar_json, summarize, to_brackets,
                               to_conllu)
from treewright.export.rename import check_renaming, parse_renaming
from treewright.grammar import load_grammar, parse_grammar
from treewright.inference import generate, score, viterbi_parse

ASTRONOMERS = (Path(__file__).resolve().parents[1] / "src" / "treewright" / "data"
              / "examples" / "astronomers.pcfg")

VELMAR = """\
@start ROOT
@unknown "<unk>"
ROOT -> S 0.8
ROOT -> NP 0.2
S -> NP VP 1.0
NP -> DET N 0.7
NP -> NP PP 0.3
VP -> V NP 0.6
VP -> VP PP 0.4
PP -> PREP NP 1.0
DET -> "ka" 0.5
DET -> "lo" 0.25
DET -> "mi" 0.25
N -> "tavo" 0.25
N -> "seru" 0.25
N -> "mandi" 0.25
N -> "<unk>" 0.25
V -> "rasku" 0.6
V -> "peln" 0.4
PREP -> "ul" 1.0
"""


@pytest.fixture
def velmar(tmp_path) -> Path:
    path = tmp_path / "velmar.pcfg"
    path.write_text(VELMAR, encoding="utf-8")
    return path


def sample_sentences(grammar, num=12, seed=3) -> list[list[str]]:
    # Short sentences keep the tests fast (the chart is cubic in length).
    return [t.leaves() for t in generate(grammar, num, seed=seed, max_words=8)]


def run_cli(*argv) -> tuple[int, str, str]:
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        code = main([str(a) for a in argv])
    return code, out.getvalue(), err.getvalue()


def write_lines(path: Path, sentences) -> Path:
    path.write_text("".join(" ".join(s) + "\n" for s in sentences), encoding="utf-8")
    return path


def scores64(grammar, sentences) -> list[float]:
    return [s.logprob for s in score(grammar, sentences, dtype=torch.float64)]


# ---- round trips -------------------------------------------------------------------------------

@pytest.mark.parametrize("fmt", ["text", "json"])
@pytest.mark.parametrize("source", ["velmar", "astronomers"])
def test_round_trip_scores_identical(fmt, source, velmar, tmp_path):
    path = velmar if source == "velmar" else ASTRONOMERS
    original = load_grammar(path)
    held_out = sample_sentences(original, seed=11)
    out = tmp_path / f"exported.{fmt}"
    assert run_cli("export", path, "--to", fmt, "--out", out)[0] == 0
    back = load(out)
    # Exact float equality (reference: the original grammar's own scores; the text format
    # prints 17 significant digits and JSON the shortest exact decimal, so nothing may move).
    assert scores64(back, held_out) == scores64(original, held_out)
    # Every rule with the same probability, to the bit.
    assert list(iter_rules(back)) == list(iter_rules(original))
    if fmt == "json":  # JSON keeps the vocabulary order too, so the tensors are the same
        for name in ("root", "binary", "lexical"):
            assert torch.equal(getattr(back, name), getattr(original, name)), name
    # The printed scores agree to the last digit as well (repr: the shortest exact decimal,
    # which is what `treewright score` prints).
    assert [repr(x) for x in scores64(back, held_out)] == \
        [repr(x) for x in scores64(original, held_out)]
    if fmt == "text":  # the core commands read the text format
        text = write_lines(tmp_path / "held.txt", held_out)
        assert run_cli("score", out, text, "--float64")[1] == \
            run_cli("score", path, text, "--float64")[1]


def test_json_from_run_folder_carries_settings_and_data_summary(velmar, tmp_path):
    run = tmp_path / "run"
    run.mkdir()
    (run / "grammar.pcfg").write_text(VELMAR, encoding="utf-8")
    (run / "config.yaml").write_text("# resolved\nseed: 7\ndata:\n  train: velmar.txt\n",
                                     encoding="utf-8")
    (run / "train.log").write_text(
        "2031-04-02 10:00:00 training corpus: 25 sentences, 140 words\n"
        "2031-04-02 10:00:01 restart 0 finished\n", encoding="utf-8")
    out = tmp_path / "run.json"
    assert run_cli("export", run, "--to", "json", "--out", out)[0] == 0
    data = json.loads(out.read_text(encoding="utf-8"))
    assert data["training"]["config"] == {"seed": 7, "data": {"train": "velmar.txt"}}
    assert data["training"]["data_summary"] == ["training corpus: 25 sentences, 140 words"]
    assert data["training"]["result"] is None
    # A data_summary.json, when the run has one, is the summary instead.
    (run / "data_summary.json").write_text('{"sentences": 25}', encoding="utf-8")
    assert open_grammar(run).training["data_summary"] == {"sentences": 25}
    # A bare grammar file has no training record.
    save_grammar_json(load(velmar), tmp_path / "bare.json")
    assert json.loads((tmp_path / "bare.json").read_text())["training"] is None


def test_json_lists_every_rule_with_its_probability(velmar):
    grammar = load_grammar(velmar)
    data = grammar_to_json(grammar)
    # Reference: the rule lines of the source file itself.
    expected = set()
    for line in VELMAR.splitlines():
        if "->" in line:
            lhs, rest = line.split(" -> ")
            *rhs, prob = rest.split()
            expected.add((lhs, tuple(x.strip('"') for x in rhs), float(prob)))
    got = {(r["lhs"], tuple(r["rhs"]), r["prob"]) for r in data["rules"]}
    assert got == expected
    assert data["format_version"] == 1 and data["unknown_word"] == "<unk>"
    assert data["counts"]["rules"] == len(expected) == sum(1 for _ in iter_rules(grammar))


# ---- JSON validation -----------------------------------------------------------------------------

def _broken(tmp_path, velmar, edit) -> Path:
    data = grammar_to_json(load_grammar(velmar))
    edit(data)
    path = tmp_path / "broken.json"
    path.write_text(json.dumps(data), encoding="utf-8")
    return path


@pytest.mark.parametrize("edit, field", [
    (lambda d: d.update(format_version=2), "format_version"),
    (lambda d: d.pop("vocabulary"), "vocabulary"),
    (lambda d: d["rules"][3].update(prob=1.5), "rules[3].prob"),
    (lambda d: d["rules"][3].update(prob=-0.1), "rules[3].prob"),
    (lambda d: d["rules"][3].update(prob="0.5"), "rules[3].prob"),
    (lambda d: d["rules"][3].pop("lhs"), "rules[3].lhs"),
    (lambda d: d["rules"][3].update(lhs="NOPE"), "rules[3].lhs"),
    (lambda d: d["rules"][3].update(rhs=["DET", "NOPE"]), "rules[3].rhs"),
    (lambda d: d["rules"][-1].update(rhs=["unseen"]), "rules[" ),
    (lambda d: d["rules"].append(dict(d["rules"][3])), "rules["),
    (lambda d: d["rules"][3].update(prob=0.6), "field rules: the rules of NP sum to"),
    (lambda d: d["counts"].update(rules=1), "counts"),
    (lambda d: d.update(nonterminals=d["nonterminals"] + ["DET"]), "nonterminals"),
])
def test_json_load_refuses_bad_files_naming_file_and_field(edit, field, tmp_path, velmar):
    path = _broken(tmp_path, velmar, edit)
    with pytest.raises(InputError) as err:
        load_grammar_json(path)
    assert str(path) in str(err.value) and field in str(err.value)


def test_json_load_refuses_non_json_and_infinities(tmp_path):
    path = tmp_path / "g.json"
    path.write_text('{"format": "treewright-grammar", "x": NaN}', encoding="utf-8")
    with pytest.raises(InputError, match="NaN"):
        load_grammar_json(path)
    path.write_text("{not json", encoding="utf-8")
    with pytest.raises(InputError, match="line 1"):
        load_grammar_json(path)


# ---- listing -------------------------------------------------------------------------------------

def test_listing_entropies_are_hand_computed_values(velmar):
    summaries = {s.name: s for s in summarize(load_grammar(velmar), threshold=0.0, top=None)}
    # Hand-computed: four words at 1/4 each carry log2(4) = 2 bits; 1/2, 1/4, 1/4 give
    # 1/2*1 + 2*(1/4*2) = 1.5 bits; a single rule carries 0 bits.
    assert summaries["N"].entropy_bits == pytest.approx(2.0, abs=1e-12)
    assert summaries["DET"].entropy_bits == pytest.approx(1.5, abs=1e-12)
    assert summaries["PP"].entropy_bits == 0.0
    # ROOT 0.8/0.2: -(0.8 log2 0.8 + 0.2 log2 0.2) = 0.7219 bits (binary entropy, from memory).
    assert summaries["ROOT"].entropy_bits == pytest.approx(0.7219, abs=1e-4)
    assert [r.rhs for r in summaries["DET"].rules] == ['"ka"', '"lo"', '"mi"']


def test_listing_threshold_and_cap_count_what_they_hide(velmar):
    summaries = {s.name: s for s in summarize(load_grammar(velmar), threshold=0.3, top=1)}
    det = summaries["DET"]
    assert [(r.rhs, r.prob) for r in det.rules] == [('"ka"', 0.5)]
    assert det.hidden == 2 and det.hidden_mass == pytest.approx(0.5)
    v = summaries["V"]  # 0.6 shown; 0.4 is above the threshold but past the cap of one
    assert v.hidden == 1 and v.hidden_mass == pytest.approx(0.4)


def test_usage_counts_match_the_two_trees_of_the_textbook_sentence():
    grammar = load_grammar(ASTRONOMERS)
    counts = expected_counts(grammar, [["astronomers", "saw", "stars", "with", "ears"]])
    # Hand computation from the grammar: the NP-attachment tree has probability
    # .1*.7*.4*.18*.18 = 0.0009072 and the VP-attachment tree .1*.3*.7*.18*.18 = 0.0006804, so
    # their posteriors are 4/7 and 3/7 (the pair of trees of Manning & Schuetze's chapter 11).
    # NP labels 4 nodes in the first and 3 in the second; VP labels 1 and 2.
    usage = dict(zip(grammar.symbols, counts.symbol_usage(grammar)))
    assert usage["NP"] == pytest.approx(4 * 4 / 7 + 3 * 3 / 7, rel=1e-9)
    assert usage["VP"] == pytest.approx(1 * 4 / 7 + 2 * 3 / 7, rel=1e-9)
    assert usage["PP"] == pytest.approx(1.0, rel=1e-9)
    assert usage["S"] == pytest.approx(1.0, rel=1e-9)


def blank(value) -> bool:
    """An underscore column as the conllu package returns it (None or '_', by column)."""
    return value is None or value == "_"


# ---- parsed corpora ------------------------------------------------------------------------------

def test_conllu_output_parses_with_the_conllu_package(velmar, tmp_path):
    grammar = load_grammar(velmar)
    sentences = sample_sentences(grammar, num=6, seed=5) + [["ka", "ul"]]  # the last: no parse
    lines = list(enumerate(sentences, start=1))
    text = to_conllu(parse_corpus(grammar, lines), rule=head_rule("auto", grammar))
    parsed = conllu.parse(text)  # reference: the conllu package reads CoNLL-U
    assert len(parsed) == len(sentences)
    viterbi = viterbi_parse(grammar, sentences)
    for sent, words, (tree, _) in zip(parsed, sentences, viterbi):
        assert [tok["form"] for tok in sent] == words
        assert all(len(tok) == 10 for tok in sent)
        assert [tok["id"] for tok in sent] == list(range(1, len(words) + 1))
        if tree is None:
            assert all(blank(tok["xpos"]) and blank(tok["head"]) for tok in sent)
            assert sent.metadata["parse"] == "none"
        else:
            # Reference: the preterminal labels of the Viterbi tree, left to right.
            tags = [label for i, j, label in tree.labeled_spans() if j - i == 1]
            assert [tok["xpos"] for tok in sent] == tags
            assert all(blank(tok[c]) for tok in sent for c in
                       ("lemma", "upos", "feats", "deps", "misc"))
            # HEAD and DEPREL are checked against head percolation in test_export_heads.py.
            assert sorted(tok["deprel"] for tok in sent) == \
                ["dep"] * (len(words) - 1) + ["root"]
            assert sent.metadata["induced_tree"] == tree.to_string()
    upos = conllu.parse(to_conllu(parse_corpus(grammar, lines[:1]), tag_column="UPOS",
                                  rule=head_rule("left")))
    assert blank(upos[0][0]["xpos"])
    assert upos[0][0]["upos"] in grammar.preterminals


VELMAR_CONLLU = """\
# sent_id = harbour-1
# text = ka tavo rasku lo seru
# note = a comment of the user's own
1	ka	ka	DET	D1	Def=Yes	2	det	2:det	_
2	tavo	tavo	NOUN	N1	_	3	nsubj	3:nsubj	_
3	rasku	rasku	VERB	V1	Tense=Past	0	root	0:root	_
4-5	loseru	_	_	_	_	_	_	_	SpaceAfter=No
4	lo	lo	DET	D1	_	5	det	5:det	_
5	seru	seru	NOUN	N1	_	3	obj	3:obj	_
5.1	seru	seru	NOUN	N1	_	_	_	3:conj	_

# sent_id = harbour-2
# text = ka ul
1	ka	ka	DET	D1	_	0	root	0:root	_
2	ul	ul	ADP	P1	_	1	case	1:case	_

"""


def test_conllu_corpus_exports_back_line_for_line(velmar, tmp_path):
    # A CoNLL-U corpus keeps every line but the induced columns: its comments, the
    # multiword-token line, the empty node, and LEMMA, UPOS, FEATS, DEPS and MISC of every
    # word. Reference for the filled columns: the same sentences exported from raw text (the
    # path checked against the conllu package and head percolation above); for the rest, the
    # input file itself. The second sentence has no parse ("ka ul" is no NP).
    corpus = tmp_path / "harbour.conllu"
    corpus.write_text(VELMAR_CONLLU, encoding="utf-8")
    raw = write_lines(tmp_path / "harbour.txt", [["ka", "tavo", "rasku", "lo", "seru"],
                                                 ["ka", "ul"]])
    out, plain = tmp_path / "out.conllu", tmp_path / "plain.conllu"
    code, _, err = run_cli("export", velmar, "--to", "conllu", "--corpus", corpus, "--out", out)
    assert code == 0 and "line 12: no parse" in err
    assert run_cli("export", velmar, "--to", "conllu", "--corpus", raw, "--out", plain)[0] == 0
    ours, reference = conllu.parse(out.read_text()), conllu.parse(plain.read_text())
    given = conllu.parse(VELMAR_CONLLU)
    for sent, ref, gold in zip(ours, reference, given):
        words = [t for t in sent if isinstance(t["id"], int)]
        assert [(t["xpos"], t["head"], t["deprel"]) for t in words] == \
            [(t["xpos"], t["head"], t["deprel"]) for t in ref]
        gold_words = [t for t in gold if isinstance(t["id"], int)]
        for column in ("form", "lemma", "upos", "feats", "deps", "misc"):
            assert [t[column] for t in words] == [t[column] for t in gold_words]
        assert [t for t in sent if not isinstance(t["id"], int)] == \
            [t for t in gold if not isinstance(t["id"], int)]
        assert sent.metadata["sent_id"] == gold.metadata["sent_id"]
        assert sent.metadata["text"] == gold.metadata["text"]
        for key in ("induced_tree", "head_rule", "parse"):
            assert sent.metadata.get(key) == ref.metadata.get(key)
    assert ours[0].metadata["note"] == "a comment of the user's own"
    assert ours[1].metadata["parse"] == "none" and ours[0].metadata["head_rule"] == "auto"
    # Line for line: every line that is not a word line is the input's, in place.
    written, read = out.read_text().splitlines(), VELMAR_CONLLU.splitlines()
    extra = [line for line in written if line.startswith(("# induced_tree", "# head_rule",
                                                           "# parse"))]
    kept = [line for line in written if line not in extra]
    assert len(kept) == len(read) and len(extra) == 3
    assert [a for a, b in zip(kept, read) if not b.split("\t")[0].isdigit()] == \
        [b for b in read if not b.split("\t")[0].isdigit()]
    # Exporting the export again replaces its comments rather than repeating them.
    again = tmp_path / "again.conllu"
    assert run_cli("export", velmar, "--to", "conllu", "--corpus", out, "--out", again)[0] == 0
    assert again.read_text() == out.read_text()
    # A comment of an earlier export that no longer holds goes too: a sentence marked
    # "parse = none" that parses now carries its tree and no such mark.
    stale = tmp_path / "stale.conllu"
    stale.write_text(VELMAR_CONLLU.replace("# note =", "# parse = none\n# note =", 1),
                     encoding="utf-8")
    fresh = tmp_path / "fresh.conllu"
    assert run_cli("export", velmar, "--to", "conllu", "--corpus", stale, "--out", fresh)[0] == 0
    first = conllu.parse(fresh.read_text())[0].metadata
    assert "parse" not in first and first["induced_tree"] == ours[0].metadata["induced_tree"]


def test_bracketed_output_keeps_every_sentence(velmar):
    grammar = load_grammar(velmar)
    sentences = sample_sentences(grammar, num=5) + [["peln"]]
    out = to_brackets(parse_corpus(grammar, list(enumerate(sentences, 1)))).splitlines()
    assert len(out) == len(sentences)
    assert out[:-1] == [t.to_string() for t, _ in viterbi_parse(grammar, sentences[:-1])]
    assert out[-1] == "(NOPARSE peln)"


def test_blank_input_lines_keep_their_place(velmar, tmp_path):
    grammar = load_grammar(velmar)
    sentences = sample_sentences(grammar, num=3)
    corpus = tmp_path / "corpus.txt"
    # Lines 1, 3 and 6 hold sentences, line 5 a sentence with no parse; 2 is empty and 4 holds
    # only spaces and a tab.
    raw = [" ".join(sentences[0]), "", " ".join(sentences[1]), "  \t ", "peln",
           " ".join(sentences[2])]
    corpus.write_text("\n".join(raw) + "\n", encoding="utf-8")
    out = tmp_path / "out.trees"
    code, _, err = run_cli("export", velmar, "--to", "brackets", "--corpus", corpus,
                           "--out", out)
    assert code == 0 and "1 of 4 sentences had no parse" in err
    # The line is named with its reason, as parse names it (one word: velmar's root rewrites
    # to nonterminals, each to two children).
    reason = f"{corpus}, line 5: no parse (one word: the grammar has no rule for a one-word tree"
    assert reason in err
    _, _, parse_err = run_cli("parse", velmar, corpus)
    assert [x for x in parse_err.splitlines() if ": no parse (" in x] == \
        [x for x in err.splitlines() if ": no parse (" in x]
    lines = out.read_text(encoding="utf-8").split("\n")
    # Reference: the input has 6 lines, so the output has 6 lines (plus the final newline).
    assert len(lines) == len(raw) + 1 and lines[-1] == ""
    trees = [t.to_string() for t, _ in viterbi_parse(grammar, sentences)]
    assert lines[:6] == [trees[0], "", trees[1], "", "(NOPARSE peln)", trees[2]]

    out = tmp_path / "out.conllu"
    code, _, err = run_cli("export", velmar, "--to", "conllu", "--corpus", corpus,
                           "--out", out)
    assert code == 0 and "2 blank lines" in err
    blocks = conllu.parse(out.read_text(encoding="utf-8"))  # reference: the conllu package
    # One block per non-blank input line, each naming its line.
    assert [b.metadata["sent_id"] for b in blocks] == ["1", "3", "5", "6"]
    assert [[t["form"] for t in b] for b in blocks] == [sentences[0], sentences[1], ["peln"],
                                                       sentences[2]]


# ---- renaming ------------------------------------------------------------------------------------

def test_renaming_applies_to_exports_and_parses(velmar, tmp_path):
    grammar = load_grammar(velmar)
    names = tmp_path / "names.txt"
    names.write_text("# Velmar names\nDET  ARTICLE\nN NOUN   # things\nS CLAUSE\n\n"
                     "VP NP\nNP VP\n", encoding="utf-8")  # the last two: a swap
    out = tmp_path / "renamed.pcfg"
    assert run_cli("export", velmar, "--to", "text", "--out", out, "--rename", names)[0] == 0
    renamed = load_grammar(out)
    held_out = sample_sentences(grammar, seed=8)
    assert scores64(renamed, held_out) == scores64(grammar, held_out)
    assert "ARTICLE" in renamed.preterminals and "CLAUSE" in renamed.nonterminals
    assert "DET" not in renamed.symbols
    conll = tmp_path / "out.conllu"
    text = write_lines(tmp_path / "s.txt", held_out[:3])
    assert run_cli("export", velmar, "--to", "conllu", "--corpus", text, "--out", conll,
                   "--rename", names)[0] == 0
    tags = {tok["xpos"] for sent in conllu.parse(conll.read_text()) for tok in sent}
    assert "DET" not in tags and tags <= {"ARTICLE", "NOUN", "V", "PREP"}
    # The swap: what was NP is now VP, so a renamed tree has the old NP spans under VP.
    tree = viterbi_parse(grammar, held_out[:1])[0][0]
    mapping = check_renaming(grammar, parse_renaming(names.read_text()))
    new_tree = viterbi_parse(rename_grammar(grammar, mapping), held_out[:1])[0][0]
    old = [(i, j) for i, j, label in tree.labeled_spans() if label == "NP"]
    assert old == [(i, j) for i, j, label in new_tree.labeled_spans() if label == "VP"]


@pytest.mark.parametrize("text, line, words", [
    ("DET A\nNOPE B\n", 2, "no symbol NOPE"),
    ("DET A\nDET B\n", 2, "renamed twice"),
    ("DET A\nN A\n", 2, "two symbols would be called A"),
    ("DET N\n", 1, "already the name"),
    ("DET\n", 1, "expected 'OLD NEW'"),
    ("DET (X)\n", 1, "may not contain"),
])
def test_renaming_errors_name_file_and_line(text, line, words, velmar, tmp_path):
    path = tmp_path / "names.txt"
    path.write_text(text, encoding="utf-8")
    code, _, err = run_cli("export", velmar, "--to", "text", "--out", tmp_path / "x.pcfg",
                           "--rename", path)
    assert code == 1
    assert f"{path}, line {line}" in err and words in err


# ---- pruning -------------------------------------------------------------------------------------

def test_pruning_with_threshold_zero_changes_nothing(velmar):
    grammar = load_grammar(velmar)
    pruned, report = prune(grammar, 0.0)
    for name in ("root", "binary", "lexical"):
        assert torch.equal(getattr(pruned, name), getattr(grammar, name))
    assert report.total_removed_mass == 0.0 and report.rules_after == report.rules_before


def test_pruning_removes_the_reported_mass_and_renormalises(velmar):
    grammar = load_grammar(velmar)
    held_out = sample_sentences(grammar, num=10, seed=9)
    pruned, report = prune(grammar, threshold=0.3, heldout=held_out)
    # Brute force reference: walk the rules of the original and add up what is gone.
    kept = {(r.lhs, r.rhs, r.kind) for r in iter_rules(pruned)}
    removed: dict[str, float] = {}
    for r in iter_rules(grammar):
        if (r.lhs, r.rhs, r.kind) not in kept:
            removed[r.lhs] = removed.get(r.lhs, 0.0) + r.prob
    assert report.removed_mass == pytest.approx(removed)
    # By hand from VELMAR: DET loses "lo" and "mi" (0.25 each), ROOT loses ROOT -> NP (0.2);
    # all four words of N sit below 0.3, so N keeps its first one and loses 0.75 (reported).
    assert removed == pytest.approx({"DET": 0.5, "N": 0.75, "ROOT": 0.2})
    assert report.kept_to_avoid_empty == ["N"]
    assert report.total_removed_mass == pytest.approx(sum(removed.values()))
    assert report.rules_after == len(kept) < report.rules_before
    # Every left-hand side still sums to one and has rules.
    assert pruned.normalization_error() < 1e-12
    assert {r.lhs for r in iter_rules(pruned)} == {r.lhs for r in iter_rules(grammar)}
    # Held-out likelihood before and after, against scoring the two grammars directly.
    for summary, g in ((report.heldout_before, grammar), (report.heldout_after, pruned)):
        parsed = [x for x in scores64(g, held_out) if x > -math.inf]
        assert summary["log_likelihood"] == pytest.approx(sum(parsed))
        assert summary["parsed"] == len(parsed)
    reparse = parse_grammar(pruned.to_text())  # the pruned grammar is a valid grammar file
    assert reparse.normalization_error() < 1e-12


def test_pruning_keeps_every_training_sentence_parseable(velmar):
    grammar = load_grammar(velmar)
    train = sample_sentences(grammar, num=20, seed=2)
    unprotected, _ = prune(grammar, threshold=0.3)
    lost = sum(1 for s in score(unprotected, train) if not s.parsed)
    assert lost > 0  # without the training corpus the cut does lose sentences...
    pruned, report = prune(grammar, threshold=0.3, train=train)
    assert report.protected_rules > 0  # ...with it, their Viterbi rules are kept
    assert report.train_unparsed_before == 0 and report.train_unparsed_after == 0
    assert all(s.parsed for s in score(pruned, train, dtype=torch.float64))
    assert pruned.normalization_error() < 1e-12


def test_pruning_keeps_at_least_one_rule_and_says_so(velmar):
    grammar = load_grammar(velmar)
    pruned, report = prune(grammar, threshold=0.9)  # above every DET, N, V, ROOT probability
    assert set(report.kept_to_avoid_empty) >= {"DET", "N", "ROOT"}
    assert {r.lhs for r in iter_rules(pruned)} == {r.lhs for r in iter_rules(grammar)}
    assert "DET" in report.format()
    pruned, report = prune(grammar, top_k=1)
    # Top 1 per symbol keeps the single best rule of each left-hand side: 1 + 9 symbols.
    assert report.rules_after == 1 + grammar.num_symbols


def test_prune_cli_reports_heldout_before_and_after(velmar, tmp_path):
    grammar = load_grammar(velmar)
    held = write_lines(tmp_path / "held.txt", sample_sentences(grammar, num=10, seed=4))
    train = write_lines(tmp_path / "train.txt", sample_sentences(grammar, num=10, seed=6))
    code, _, err = run_cli("export", velmar, "--to", "json", "--out", tmp_path / "p.json",
                           "--prune-threshold", "0.3", "--train", train, "--heldout", held)
    assert code == 0
    assert "held-out before" in err and "held-out after" in err
    assert "probability mass removed" in err
    pruned = load(tmp_path / "p.json")
    assert math.isclose(pruned.normalization_error(), 0.0, abs_tol=1e-12)


def test_export_and_inspect_read_text_as_the_run_was_trained(tmp_path):
    # Published worked example (Manning & Schuetze 1999, ch. 11; from memory): the Viterbi tree
    # of "astronomers saw stars with ears" attaches "with ears" to "stars" (p = 0.0009072). The
    # input is written in capitals and read through a run folder trained with data.lowercase.
    run = tmp_path / "run"
    run.mkdir()
    (run / "grammar.pcfg").write_bytes(ASTRONOMERS.read_bytes())
    (run / "config.yaml").write_text("data:\n  lowercase: true\n", encoding="utf-8")
    text = write_lines(tmp_path / "s.txt", [["Astronomers", "SAW", "stars", "with", "Ears"]])
    out = tmp_path / "p.trees"
    code, _, err = run_cli("export", run, "--to", "brackets", "--corpus", text, "--out", out)
    assert code == 0 and "lowercasing the input words" in err
    tree = out.read_text().split("\n")[0]
    assert tree.split() == ("(S (NP Astronomers) (VP (V SAW) (NP (NP stars) (PP (P with) "
                            "(NP Ears)))))").split()
    code, listing, _ = run_cli("inspect", run, "--corpus", text, "--top", "2")
    assert code == 0 and "without a parse" in listing and "(0 without a parse)" in listing
