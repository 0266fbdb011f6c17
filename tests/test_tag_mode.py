"""Tag mode end to end: train on tags, parse a tagged corpus, print words, evaluate against gold.

Data: a slice of the Turkish Web Treebank `web` section (turkish-treebanks package), read here
with the `conllu` package for every reference value. References: the conllu package's FORM and
UPOS columns (the words printed, the tags parsed); the grammar's own Viterbi trees over those
UPOS sequences (the tags used inside); bracket F1 recomputed in this file from the dependency
subtree yields with `test_evaluate_turkish.reference_gold` (dependency yields as gold brackets,
punctuation removed, whole-sentence span left out, sentence F1 averaged: common practice).
"""

from __future__ import annotations

import json
import statistics
import sysconfig
from pathlib import Path

import pytest

conllu = pytest.importorskip("conllu")

from test_evaluate_turkish import reference_gold  # noqa: E402
from treewright.cli import main  # noqa: E402
from treewright.corpus import parse_brackets, read_tagged  # noqa: E402
from treewright.errors import InputError  # noqa: E402
from treewright.export import open_grammar  # noqa: E402
from treewright.inference import viterbi_parse  # noqa: E402
from treewright.trees import Tree  # noqa: E402

WEB = Path(sysconfig.get_paths()["purelib"]) / "data" / "web.conllu"

CONFIG = """\
data:
  train: {train}
  dev: {dev}
  tag_mode: true
model:
  nonterminals: 6
  preterminals: 12
train:
  epochs: 4
  restarts: 1
output:
  run_dir: {run}
  tensorboard: false
  progress: false
  stdout_metrics: false
"""


def _projective(heads: list[int]) -> bool:
    arcs = [(min(d, h), max(d, h)) for d, h in enumerate(heads, start=1) if h != 0]
    return not any(a < c < b < d for a, b in arcs for c, d in arcs)


@pytest.fixture(scope="module")
def slice_files(tmp_path_factory):
    if not WEB.exists():
        pytest.skip("turkish-treebanks is not installed")
    chosen = []
    for sentence in conllu.parse(WEB.read_text(encoding="utf-8")):
        tokens = [t for t in sentence if isinstance(t["id"], int)]
        if len(tokens) != len(sentence) or not 3 <= len(tokens) <= 10:
            continue  # multiword tokens would need more care; short sentences keep it fast
        if any(c in t["form"] for t in tokens for c in "()"):
            continue
        if _projective([t["head"] for t in tokens]):
            chosen.append(sentence)
        if len(chosen) == 160:
            break
    folder = tmp_path_factory.mktemp("tags")
    train, gold = folder / "train.conllu", folder / "gold.conllu"
    train.write_text("".join(s.serialize() for s in chosen[:120]), encoding="utf-8")
    gold.write_text("".join(s.serialize() for s in chosen[120:]), encoding="utf-8")
    config = folder / "tags.yaml"
    run = folder / "run"
    config.write_text(CONFIG.format(train=train, dev=gold, run=run), encoding="utf-8")
    assert main(["train", str(config)]) == 0
    return {"run": run, "gold": gold, "sentences": chosen[120:], "folder": folder}


def _cli(capsys, *argv) -> str:
    capsys.readouterr()
    assert main([str(a) for a in argv]) == 0
    return capsys.readouterr().out


def test_parse_takes_the_tags_and_prints_the_words(slice_files, capsys):
    out = _cli(capsys, "parse", slice_files["run"], slice_files["gold"]).splitlines()
    gold = slice_files["sentences"]
    assert len(out) == len(gold)
    grammar = open_grammar(str(slice_files["run"])).grammar
    upos = [[t["upos"] for t in s] for s in gold]
    assert set(grammar.vocab.index) <= {u for s in upos for u in s} | {grammar.vocab.unk}
    expected = viterbi_parse(grammar, upos)  # reference: the grammar over the conllu UPOS
    for line, sentence, (tree, _) in zip(out, gold, expected):
        (printed,) = parse_brackets(line)
        assert printed.leaves() == [t["form"] for t in sentence]  # the words, as written
        assert tree is not None
        assert printed.labeled_spans() == tree.labeled_spans()  # the tags' tree


def reference_f1(pred_lines: list[str], gold) -> float:
    """Mean sentence F1 of predicted trees against dependency-yield gold, punctuation removed."""
    scores = []
    for line, sentence in zip(pred_lines, gold):
        words = [t["form"] for t in sentence]
        tags = [t["upos"] for t in sentence]
        heads = {t["id"]: t["head"] for t in sentence}
        m, gold_spans, _ = reference_gold(words, tags, heads)
        kept = [i for i, tag in enumerate(tags) if tag != "PUNCT"]
        position = {k: j for j, k in enumerate(kept)}
        pred = set()
        for i, j, _ in parse_brackets(line)[0].labeled_spans():
            inner = [position[k] for k in range(i, j) if k in position]
            if len(inner) >= 2 and (inner[0], inner[-1] + 1) != (0, m):
                pred.add((inner[0], inner[-1] + 1))
        if not pred and not gold_spans:
            continue
        scores.append(2 * len(pred & gold_spans) / (len(pred) + len(gold_spans)))
    return statistics.fmean(scores)


def test_evaluate_scores_the_tag_parses_against_gold_words(slice_files, capsys, tmp_path):
    pred = tmp_path / "pred.trees"
    lines = _cli(capsys, "parse", slice_files["run"], slice_files["gold"])
    pred.write_text(lines, encoding="utf-8")
    report = json.loads(_cli(capsys, "evaluate", pred, slice_files["gold"], "--json", "-"))
    model = report["brackets"]["systems"]["model"]
    expected = reference_f1(lines.splitlines(), slice_files["sentences"])
    assert model["sentence_f1"] == pytest.approx(expected, abs=1e-12)
    assert report["tags"]["tokens"] == sum(len(s) for s in slice_files["sentences"])

    # The same grammar on a raw file of the tags: the trees come out over tags, and evaluate
    # puts the gold words back, with the same scores.
    tags = tmp_path / "gold.tags"
    tags.write_text("".join(" ".join(t["upos"] for t in s) + "\n"
                            for s in slice_files["sentences"]), encoding="utf-8")
    over_tags = tmp_path / "pred_tags.trees"
    over_tags.write_text(_cli(capsys, "parse", slice_files["run"], tags), encoding="utf-8")
    again = json.loads(_cli(capsys, "evaluate", over_tags, slice_files["gold"], "--json", "-"))
    assert again["brackets"]["systems"] == report["brackets"]["systems"]
    assert again["counts"]["predictions_over_tags"] == len(slice_files["sentences"])
    assert "predictions_over_tags" not in report["counts"]


def test_a_tagged_record_that_gives_no_sentence_is_refused_with_its_line(tmp_path):
    path = tmp_path / "mixed.trees"
    path.write_text("(S (N a) (V b))\n(S (N a) b)\n", encoding="utf-8")
    with pytest.raises(InputError) as caught:
        read_tagged(path)
    assert caught.value.line == 2 and "no_tags" in str(caught.value)
    text = tmp_path / "tags.txt"
    text.write_text("N V\n", encoding="utf-8")
    assert read_tagged(text) is None  # raw text: the tokens are the tags already
    sentences = read_tagged(_one(tmp_path))
    assert [(s.words, s.tokens) for s in sentences] == [(["a", "b"], ["N", "V"])]


def _one(tmp_path) -> Path:
    path = tmp_path / "one.trees"
    path.write_text(Tree("S", [Tree("N", ["a"]), Tree("V", ["b"])]).to_string() + "\n",
                    encoding="utf-8")
    return path
