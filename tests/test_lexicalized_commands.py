"""The lexicalized model through the commands: `parse --heads-out` writes the induced heads as
CoNLL-U, `evaluate` scores that file, and `inspect` and the report list what the model learned
about words.

One tiny run is trained once for the module (60 sentences of the invented head-final language
of scripts/make_headed_language.py, three epochs, small sizes); its gold test file carries the
language's true heads. References: `decode.decode_heads` called directly (the heads), the
`conllu` package reading the written file (the columns kept), `evaluate_attachment` called
directly (the scores), and dense score tables formed by explicit loops (the listed pairs). For
`--function-words`, the model's heads converted by `head_conventions.content_heads` (checked by
recovery of the invented languages' true heads in tests/test_head_conventions.py).
"""

from __future__ import annotations

import importlib.util
import json
import math
import re
import sys
from pathlib import Path

import conllu
import pytest
import torch

from treewright.cli import main
from treewright.corpus import parse_brackets
from treewright.decode import decode_heads
from treewright.evaluation import BracketConventions
from treewright.evaluation.dependencies import Dependencies, evaluate_attachment
from treewright.head_conventions import PUNCTUATION, content_heads
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
    # The printed trees are over each block's words (a CoNLL-U TEXT is read by its FORMs).
    assert [parse_brackets(line)[0].leaves() for line in printed] == words
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


def test_export_to_conllu_writes_the_models_own_trees_and_heads(trained, tmp_path):
    # `export RUN --to conllu` from a lexicalized run: HEAD is the model's (reference: decode
    # heads called directly), the tree comment its best derivation over the written words,
    # and --heads right reads the heads off that run's grammar trees by the rule instead.
    run, data = trained
    lines = (data / "test.txt").read_text(encoding="utf-8").splitlines()[:5]
    text = tmp_path / "test.txt"
    text.write_text("\n".join(lines) + "\n", encoding="utf-8")
    out = tmp_path / "out.conllu"
    assert main(["export", str(run), "--to", "conllu", "--corpus", str(text),
                 "--out", str(out)]) == 0
    pred = conllu.parse(out.read_text(encoding="utf-8"))
    words = [line.split() for line in lines]
    assert [[t["form"] for t in s] for s in pred] == words
    heads = [[t["head"] for t in s] for s in pred]
    assert heads == _reference_heads(run, words)
    assert all(s.metadata["head_rule"] == "lexicalized model" for s in pred)
    # Each word's DEPREL is root exactly where its head is 0 (one root a sentence).
    assert all([t["deprel"] for t in s] == ["root" if h == 0 else "dep" for h in hs]
               and hs.count(0) == 1 for s, hs in zip(pred, heads))
    loaded = load_lexicalized(run)
    trees = [p.tree.to_string() for p in decode_heads(
        loaded.model, loaded.vocab, words, loaded.nonterminals, loaded.preterminals)]
    assert [s.metadata["induced_tree"] for s in pred] == trees
    ruled = tmp_path / "ruled.conllu"
    assert main(["export", str(run), "--to", "conllu", "--corpus", str(text), "--heads",
                 "right", "--out", str(ruled)]) == 0
    rule = conllu.parse(ruled.read_text(encoding="utf-8"))
    assert all(s.metadata["head_rule"] == "right" for s in rule)
    # Right-headed throughout: every word but the last depends on a word to its right.
    assert all(t["head"] > t["id"] for s in rule for t in list(s)[:-1])


def test_heads_out_refuses_a_model_without_heads(trained, tmp_path, capsys):
    run, data = trained
    out = tmp_path / "pred.conllu"
    for grammar in (REPO / "src/treewright/data/examples/astronomers.pcfg", run / "grammar.pcfg"):
        assert main(["parse", str(grammar), str(data / "test.txt"), "--heads-out",
                     str(out)]) == 1
        err = capsys.readouterr().err
        assert "--heads-out needs a lexicalized model's run folder" in err and str(grammar) in err
        assert not out.exists()


def _dense_tables(run: Path):
    """The model's own score tables, formed whole by explicit loops over the small vocabulary
    (the reference for what `inspect` and the report list): word pairs, head-symbol pairs and
    back-off weights, by the definitions in the docstrings of params/lexicalized.py."""
    loaded = load_lexicalized(run)
    model, words = loaded.model, loaded.vocab.words
    names = loaded.nonterminals + loaded.preterminals
    with torch.no_grad():
        head = model.head_classes(model.word_embeddings).exp().tolist()     # [V][NT][R]
        dep = model.dependent_words().exp().tolist()                         # [R][V]
        child = model.dependent_children().exp().tolist()                    # [R][S]
        prior = model.class_prior().exp().tolist()                           # [R]
        logits = model.backoff_logits.tolist()                               # [NT]
    V, NT, R, S = len(words), len(logits), len(prior), len(names)
    pairs = {}
    for x in range(V):
        for y in range(V):
            given = sum(head[x][a][r] * dep[r][y] for a in range(NT) for r in range(R)) / NT
            backoff = sum(prior[r] * dep[r][y] for r in range(R))
            pairs[words[x], words[y]] = math.log(given) - math.log(backoff)
    joint = [[sum(prior[r] * child[r][c] * dep[r][x] for r in range(R)) for x in range(V)]
             for c in range(S)]
    total = sum(map(sum, joint))
    pc = [sum(row) / total for row in joint]
    px = [sum(joint[c][x] for c in range(S)) / total for x in range(V)]
    symbols = {(names[c], words[x]): math.log(joint[c][x] / total / pc[c] / px[x])
               for c in range(S) for x in range(V)}
    lambdas = [(names[a], 1 / (1 + math.exp(-logits[a]))) for a in range(NT)]
    return pairs, symbols, lambdas


def _top(table: dict, k: int) -> list[tuple]:
    return [(*key, value) for key, value in sorted(table.items(), key=lambda kv: -kv[1])[:k]]


def _listed(lines: list[str], title: str, k: int) -> list[list[str]]:
    start = lines.index(title) + 3          # the title, its scoring note, the column heads
    return [line.split() for line in lines[start:start + k]]


def test_inspect_and_report_list_the_top_of_the_dense_tables(trained, tmp_path, capsys):
    run, _ = trained
    k = 6
    pairs, symbols, lambdas = _dense_tables(run)
    assert main(["inspect", str(run), "--pairs", str(k)]) == 0
    lines = capsys.readouterr().out.splitlines()
    for title, table in (("strongest head-dependent word pairs", pairs),
                         ("strongest head-symbol pairs", symbols)):
        listed = _listed(lines, title, k)
        want = _top(table, k)
        assert [tuple(row[1:]) for row in listed] == [w[:2] for w in want]
        assert all(abs(float(row[0]) - w[2]) <= 5e-4 for row, w in zip(listed, want))
    listed = _listed(lines, "back-off weight per nonterminal", len(lambdas))
    assert [row[0] for row in listed] == [a for a, _ in lambdas]
    assert all(abs(float(row[1]) - w) <= 5e-4 for row, (_, w) in zip(listed, lambdas))

    # The report shows the same three tables, in the same order, with the same scores.
    page = tmp_path / "report.html"
    assert main(["report", str(run), "--out", str(page)]) == 0
    text = page.read_text(encoding="utf-8")
    tables = re.findall(r"<table class='lexical'>(.*?)</table>", text)
    assert len(tables) == 3 and 'href="#lexical"' in text
    rows = [[re.findall(r"<td[^>]*>(.*?)</td>", row) for row in re.findall(r"<tr>(.*?)</tr>", t)
             if "<td" in row] for t in tables]
    assert [(r[0], float(r[1])) for r in rows[0]] == [(a, round(w, 3)) for a, w in lambdas]
    for got, table in zip(rows[1:], (pairs, symbols)):
        want = _top(table, 10)                       # the report shows the default ten
        assert [tuple(r[:2]) for r in got] == [w[:2] for w in want]
        assert all(abs(float(r[2]) - w[2]) <= 5e-4 for r, w in zip(got, want))


def test_inspect_and_report_of_other_grammars_have_no_head_words(tmp_path, capsys):
    # A grammar file has no lexicalized model: the listing alone, and no such report section.
    grammar = REPO / "src/treewright/data/examples/astronomers.pcfg"
    assert main(["inspect", str(grammar)]) == 0
    assert "head-dependent" not in capsys.readouterr().out
    assert main(["inspect", str(grammar), "--pairs", "0"]) == 1
    assert "--pairs wants a positive count" in capsys.readouterr().err


def _function_list(data: Path, folder: Path) -> tuple[Path, list[str]]:
    """A file of the language's function words, from its true tags in the gold test file (every
    tag but the content tags and the final mark's), written as a user would list them."""
    gold = conllu.parse((data / "test.conllu").read_text(encoding="utf-8"))
    function = sorted({t["form"] for s in gold for t in s
                       if t["upos"] not in headed.CONTENT_TAGS and t["upos"] != "PUNCT"})
    assert len(function) >= 5
    listed = folder / "function.txt"
    listed.write_text("# the language's function words\n" + "\n".join(function) + "\n",
                      encoding="utf-8")
    return listed, function


def _content_reference(run: Path, words: list[list[str]], function: list[str]):
    """(heads of decode_heads, the same converted by head_conventions.content_heads), the
    function words those listed and punctuation."""
    loaded = load_lexicalized(run)
    parses = decode_heads(loaded.model, loaded.vocab, words, loaded.nonterminals,
                          loaded.preterminals)
    marks = set(function) | PUNCTUATION
    return [p.heads for p in parses], [
        content_heads(p.tree, p.heads, [w in marks for w in sentence])
        for p, sentence in zip(parses, words)]


def test_function_words_write_the_heads_in_the_content_head_convention(trained, tmp_path,
                                                                         capsys):
    run, data = trained
    gold_path = data / "test.conllu"
    listed, function = _function_list(data, tmp_path)
    out = tmp_path / "content.conllu"
    assert main(["parse", str(run), str(gold_path), "--heads-out", str(out),
                 "--function-words", str(listed)]) == 0
    err = capsys.readouterr().err
    words = [[t["form"] for t in s] for s in conllu.parse(gold_path.read_text(encoding="utf-8"))]
    used = {w for sentence in words for w in sentence if w in function}
    assert f"content heads: {len(used)} of the listed function words occur in" in err
    heads = [[t["head"] for t in s] for s in conllu.parse(out.read_text(encoding="utf-8"))]
    given, want = _content_reference(run, words, function)
    assert heads == want
    assert heads != given     # the tiny model heads some phrases by function words
    # The convention itself: no listed word (nor punctuation) heads an unlisted word.
    marks = set(function) | PUNCTUATION
    for sentence, h in zip(words, heads):
        for k, head in enumerate(h):
            if head and sentence[head - 1] in marks:
                assert sentence[k] in marks

    # export --to conllu writes the same heads, and says so in its head_rule comment.
    exported = tmp_path / "exported.conllu"
    assert main(["export", str(run), "--to", "conllu", "--corpus", str(gold_path), "--out",
                 str(exported), "--function-words", str(listed)]) == 0
    blocks = conllu.parse(exported.read_text(encoding="utf-8"))
    assert [[t["head"] for t in s] for s in blocks] == want
    assert all(s.metadata["head_rule"] == "lexicalized model, function words as dependents"
               for s in blocks)
    # Heads read off the back-off grammar's trees by a rule are converted the same way
    # (reference: the rule's heads of the written trees, converted by content_heads).
    ruled, plain = tmp_path / "ruled.conllu", tmp_path / "plain.conllu"
    for path, extra in ((ruled, ["--function-words", str(listed)]), (plain, [])):
        assert main(["export", str(run), "--to", "conllu", "--corpus", str(gold_path),
                     "--heads", "right", "--out", str(path), *extra]) == 0
    ruled_blocks = conllu.parse(ruled.read_text(encoding="utf-8"))
    plain_blocks = conllu.parse(plain.read_text(encoding="utf-8"))
    assert all(s.metadata["head_rule"] == "right, function words as dependents"
               for s in ruled_blocks)
    moved = 0
    for r, q in zip(ruled_blocks, plain_blocks):
        tree = parse_brackets(q.metadata["induced_tree"])[0]
        sentence = [t["form"] for t in q]
        expect = content_heads(tree, [t["head"] for t in q], [w in marks for w in sentence])
        assert [t["head"] for t in r] == expect
        moved += expect != [t["head"] for t in q]
    assert moved > 0


def test_function_words_are_refused_where_they_cannot_apply(trained, tmp_path, capsys):
    run, data = trained
    out = tmp_path / "content.conllu"
    assert main(["parse", str(run), str(data / "test.txt"), "--function-words",
                 "ud-function"]) == 1
    assert "give --heads-out PATH too" in capsys.readouterr().err
    assert main(["parse", str(run), str(data / "test.txt"), "--heads-out", str(out),
                 "--function-words", "ud-function"]) == 1
    err = capsys.readouterr().err
    assert "names Universal Dependencies tags, but the grammar was trained on words" in err
    weighted = tmp_path / "weighted.txt"
    weighted.write_text("ko -2\n", encoding="utf-8")
    assert main(["parse", str(run), str(data / "test.txt"), "--heads-out", str(out),
                 "--function-words", str(weighted)]) == 1
    err = capsys.readouterr().err
    assert f"{weighted}, line 1" in err and "one function word per line" in err
    assert not out.exists()


def test_heads_out_refuses_words_the_run_removed(trained, tmp_path, capsys):
    # A run on tags that removed the PUNCT words (data.drop_tags) has no head for them, so the
    # heads file is refused, naming the first sentence with such a word, before any decoding.
    _, data = trained
    run = tmp_path / "tags"
    assert main(["train", str(CONFIG), f"data.train={data / 'train.conllu'}", "data.dev=null",
                 "data.tag_mode=true", "data.drop_tags=PUNCT", "model.nonterminals=2",
                 "model.preterminals=3", "model.head_classes=2", "model.embedding_dim=8",
                 "train.epochs=1", f"output.run_dir={run}", "output.progress=false",
                 "output.stdout_metrics=false", "output.tensorboard=false"]) == 0
    capsys.readouterr()
    out = tmp_path / "pred.conllu"
    gold = data / "test.conllu"
    assert main(["parse", str(run), str(gold), "--heads-out", str(out)]) == 1
    captured = capsys.readouterr()
    assert captured.out == "" and not out.exists()
    # Every test sentence ends with the final mark, so the first block (line 1) is named.
    assert f"{gold}, line 1: --heads-out" in captured.err and "data.drop_tags" in captured.err


def _binary_bracketings(i: int, j: int):
    """Every binary tree over words i..j-1, as its set of spans of width >= 2 (brute force)."""
    if j - i == 1:
        yield frozenset()
        return
    for k in range(i + 1, j):
        for left in _binary_bracketings(i, k):
            for right in _binary_bracketings(k, j):
                yield left | right | {(i, j)}


def test_the_lexicalized_decoder_prints_the_mbr_tree_of_the_models_own_posteriors(
        trained, tmp_path, capsys):
    # Reference: every binary tree of each sentence enumerated, the one with the largest sum
    # of the model's span posteriors (heads summed out; engine.lexicalized's posteriors are
    # checked against enumeration of every lexicalized tree in test_engine_lexicalized.py).
    run, data = trained
    gold_path = data / "test.conllu"
    assert main(["parse", str(run), str(gold_path), "--decoder", "lexicalized",
                 "--scores", "--objective"]) == 0
    printed = [line.split("\t") for line in capsys.readouterr().out.splitlines()]
    sentences = [[t["form"] for t in s]
                 for s in conllu.parse(gold_path.read_text(encoding="utf-8"))]
    loaded = load_lexicalized(run)
    scorer = loaded.model.scorer()
    symbols = set(loaded.nonterminals) | set(loaded.preterminals)
    differs = 0
    for (tree_text, logprob, posterior, objective), words in zip(printed, sentences):
        ids = torch.tensor([loaded.vocab.encode(words)])
        logz, spans = scorer.span_posteriors(ids, torch.tensor([len(words)]))
        n = len(words)

        def gain(tree):
            return sum(float(spans[0, i, j - i]) for i, j in tree)

        best = max(_binary_bracketings(0, n), key=gain)
        tree = parse_brackets(tree_text)[0]
        got = {(i, j) for i, j, _ in tree.labeled_spans() if j - i >= 2}
        assert got == best
        assert tree.leaves() == words
        assert {node.label for node in tree.subtrees()} <= symbols
        assert (logprob, posterior) == ("nan", "nan")
        assert float(objective) == pytest.approx(gain(best), rel=1e-9)
        backoff = main_tree(run, words)
        differs += backoff != got
    # The back-off grammar's own mbr trees are another decoder's: here they differ somewhere.
    assert differs > 0


def main_tree(run: Path, words: list[str]) -> set:
    from treewright.decode import decode
    from treewright.grammar import load_grammar
    grammar = load_grammar(run / "grammar.pcfg", tolerance=1e-4)
    (result,) = decode(grammar, [words], "mbr")
    return {(i, j) for i, j, _ in result.tree.labeled_spans() if j - i >= 2}


def _step_metrics(tmp_path: Path, name: str, extra: list[str]) -> list[dict]:
    """Train two epochs (4 updates of 16 sentences each) on the head-final text written in
    `tmp_path`, into `tmp_path / name`, and return the metric lines of every update."""
    assert main(["train", str(CONFIG), f"data.train={tmp_path / 'head-final' / 'train.txt'}",
                 "data.dev=null", "model.nonterminals=3", "model.preterminals=6",
                 "model.head_classes=4", "model.embedding_dim=16", "train.epochs=2",
                 "train.dtype=float64", "optimizer.warmup_steps=0",
                 f"output.run_dir={tmp_path / name}", "output.progress=false",
                 "output.stdout_metrics=false", "output.tensorboard=false",
                 "output.log_every_steps=1", *extra]) == 0
    lines = [json.loads(x) for x in (tmp_path / name / "metrics.jsonl").read_text(
        encoding="utf-8").splitlines()]
    return [x for x in lines if "step/loglik_per_word" in x]


def test_annealed_training_follows_the_tempered_posterior_then_the_model(tmp_path):
    # Deterministic annealing (Smith & Eisner 2004): beta rises linearly from
    # 1 / train.anneal_from (a temperature) to 1 over train.anneal_epochs epochs (4 updates of
    # 16 sentences an epoch here), and each update's objective is
    # (1/beta) log sum_d p(d)^beta. References: the
    # linear schedule recomputed here, and the power-mean inequality (for beta < 1,
    # (sum_d p_d^beta)^(1/beta) >= sum_d p_d, strictly when two or more derivations have
    # mass: common practice), on the first update, which both runs make from the same start
    # on the same batch.
    headed.write_order("head-final", tmp_path, 60, 12, 8, 0)
    steps = {}
    for name, extra in (("plain", []),
                        ("annealed", ["train.anneal_from=2", "train.anneal_epochs=1"])):
        steps[name] = _step_metrics(tmp_path, name, extra)
    annealed, plain = steps["annealed"], steps["plain"]
    assert len(annealed) == len(plain) == 8
    assert [x.get("anneal_beta") for x in annealed] == [0.5, 0.625, 0.75, 0.875] + [None] * 4
    assert all("anneal_beta" not in x for x in plain)
    assert annealed[0]["step/loglik_per_word"] > plain[0]["step/loglik_per_word"] + 1e-6


def test_annealing_is_refused_where_it_cannot_work(tmp_path, capsys):
    text = tmp_path / "t.txt"
    text.write_text("ka vo\nsi ka vo\n", encoding="utf-8")
    assert main(["train", str(CONFIG), f"data.train={text}", "data.dev=null",
                 "model.parameterization=tabular", "train.method=em",
                 "train.anneal_from=2", "train.anneal_epochs=2",
                 f"output.run_dir={tmp_path / 'run'}"]) != 0
    assert "train.anneal_from" in capsys.readouterr().err
    assert main(["train", str(CONFIG), f"data.train={text}", "data.dev=null", "train.epochs=3",
                 "train.anneal_from=2", "train.anneal_epochs=4",
                 f"output.run_dir={tmp_path / 'run'}"]) != 0
    assert "would not reach beta = 1 within train.epochs=3" in capsys.readouterr().err


def test_head_word_bias_weighs_the_dependents_of_listed_words(tmp_path):
    # bias.head_weight adds its log-weight for every dependent a word of bias.head_list takes
    # (here function words: determiners, the genitive mark and the final stop), so the
    # first update's objective, log sum_d p(d) exp(bias(d)), falls below the plain
    # log sum_d p(d) (both runs make it from the same start on the same batch; strictly, as
    # some derivation of a sentence of two or more words lets a listed word take a
    # dependent). tests/test_head_list.py checks the potentials themselves and their fade.
    headed.write_order("head-final", tmp_path, 60, 12, 8, 0)
    words = tmp_path / "function-words.txt"
    words.write_text("# the determiners, the genitive mark and the final stop\nko\nvesh\n\n"
                     "vo\n.\nnever-seen\n", encoding="utf-8")
    steps = {}
    for name, extra in (("plain", []),
                        ("biased", ["bias.head_weight=-2", f"bias.head_list={words}"])):
        steps[name] = [x["step/loglik_per_word"] for x in _step_metrics(tmp_path, name, extra)]
    assert steps["biased"][0] < steps["plain"][0] - 1e-6
    log = (tmp_path / "biased" / "train.log").read_text(encoding="utf-8")
    assert ("head list (" + str(words) + "): 4 words in the training vocabulary, 1 listed but "
            "unused; the log-weight of each dependent they take in training: -2 for 4") in log


def test_arc_length_bias_weighs_long_dependencies_in_training(tmp_path):
    # bias.arc_length adds its log-weight for every word between a dependent and its head, so
    # with a negative weight the first update's objective, log sum_d p(d) exp(bias(d)), falls
    # below the plain log sum_d p(d) (same start, same batch; strictly, as a sentence of three
    # or more words has derivations with a dependency over a word). The weight's effect on
    # log Z itself is checked against enumeration in tests/test_params_lexicalized.py.
    headed.write_order("head-final", tmp_path, 60, 12, 8, 0)
    steps = {name: [x["step/loglik_per_word"] for x in _step_metrics(tmp_path, name, extra)]
             for name, extra in (("plain", []), ("local", ["bias.arc_length=-1"]))}
    assert steps["local"][0] < steps["plain"][0] - 1e-6


def test_head_word_bias_is_refused_where_it_cannot_work(tmp_path, capsys):
    text = tmp_path / "t.txt"
    text.write_text("ka vo\nsi ka vo\n", encoding="utf-8")
    words = tmp_path / "words.txt"
    words.write_text("vo\nka si\n", encoding="utf-8")
    base = ["train", str(CONFIG), f"data.train={text}", "data.dev=null", "train.epochs=1",
            f"output.run_dir={tmp_path / 'run'}", "output.progress=false"]
    cases = [
        (["model.parameterization=tabular", "train.method=em", "bias.head_weight=-1",
          f"bias.head_list={words}"], "bias.head_list: the head-word bias acts on heads"),
        (["model.parameterization=tabular", "train.method=em", "bias.arc_length=-1"],
         "bias.arc_length: the arc-length bias acts on dependencies"),
        (["bias.head_weight=-1"], "bias.head_weight weighs the words of bias.head_list"),
        (["bias.head_weight=-1", "bias.head_list=ud-function"], "data.tag_mode=true"),
        (["bias.head_list=ud-function", "data.tag_mode=true"],
         "'ud-function' gives its tags no weight of their own"),
        (["bias.head_weight=-1", f"bias.head_list={words}"],
         f"{words}, line 2: the weight of 'ka' is not a finite number: 'si'"),
        (["bias.head_weight=-1", f"bias.head_list={tmp_path / 'missing.txt'}"],
         "no such file"),
    ]
    for extra, message in cases:
        assert main(base + extra) != 0
        assert message in capsys.readouterr().err


def test_the_lexicalized_decoder_and_heads_keep_split_words_whole(trained, tmp_path, capsys):
    # The test file with every second and third word written as one (SpaceAfter=No on the
    # second), decoded with --word-pieces host-first. References: every binary tree that keeps
    # each third word with its host (no span of two or more words starts there), the best by
    # the model's span posteriors under the constraint (`span_posteriors` with the potentials;
    # the lexicalized engine under them is checked against enumeration in
    # test_lexicalized.py), and `decode_heads` under the same constraint for the heads.
    from treewright.word_pieces import piece_mask
    run, data = trained
    lines = (data / "test.conllu").read_text(encoding="utf-8").split("\n")
    joined = []
    for line in lines:
        fields = line.split("\t")
        if len(fields) == 10 and fields[0] == "2":
            fields[9] = "SpaceAfter=No"
        joined.append("\t".join(fields))
    text = tmp_path / "joined.conllu"
    text.write_text("\n".join(joined), encoding="utf-8")
    out = tmp_path / "heads.conllu"
    assert main(["parse", str(run), str(text), "--decoder", "lexicalized", "--word-pieces",
                 "host-first", "--heads-out", str(out)]) == 0
    captured = capsys.readouterr()
    assert "the host comes first; split written words in 12 of 12 sentences" in captured.err
    sentences = [[t["form"] for t in s] for s in conllu.parse(text.read_text(encoding="utf-8"))]
    loaded = load_lexicalized(run)
    scorer = loaded.model.scorer()
    moved = 0
    for tree_text, words in zip(captured.out.splitlines(), sentences, strict=True):
        n = len(words)
        ids = torch.tensor([loaded.vocab.encode(words)])
        pot = piece_mask("first", [[2]], n, torch.float64)
        _, spans = scorer.span_posteriors(ids, torch.tensor([n]), pot)

        def gain(tree, spans=spans):
            return sum(float(spans[0, i, j - i]) for i, j in tree)

        allowed = [t for t in _binary_bracketings(0, n) if all(i != 2 for i, _ in t)]
        got = {(i, j) for i, j, _ in parse_brackets(tree_text)[0].labeled_spans() if j - i >= 2}
        assert got == max(allowed, key=gain)
        _, free = scorer.span_posteriors(ids, torch.tensor([n]))
        moved += got != max(_binary_bracketings(0, n),
                            key=lambda t: sum(float(free[0, i, j - i]) for i, j in t))
    assert moved >= 1
    heads = [[t["head"] for t in s] for s in conllu.parse(out.read_text(encoding="utf-8"))]
    want = decode_heads(loaded.model, loaded.vocab, sentences, loaded.nonterminals,
                        loaded.preterminals, pieces=("first", [[2]] * len(sentences)))
    assert heads == [p.heads for p in want]
    assert heads != _reference_heads(run, sentences)      # the constraint moved some head
    # export --to conllu writes the same heads (its trees are the same derivations).
    exported = tmp_path / "exported.conllu"
    assert main(["export", str(run), "--to", "conllu", "--corpus", str(text), "--out",
                 str(exported), "--word-pieces", "host-first"]) == 0
    assert [[t["head"] for t in s]
            for s in conllu.parse(exported.read_text(encoding="utf-8"))] == heads
