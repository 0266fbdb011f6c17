"""A refined treebank grammar reads unseen words as its training read rare words: by their
shape class (refine.signatures), saved with the grammar (`@word-shapes`, JSON `word_shapes`).

References: `refine.signatures.signature` and `WordClasses` (the training-time mapping) for the
class of each word, and hand-worked class names from the cue rules of that module's docstring.
"""

from __future__ import annotations

import io
import json

import pytest
import torch

from treewright.errors import InputError
from treewright.export.jsonformat import grammar_json_text, load_grammar_json
from treewright.grammar import load_grammar, parse_grammar
from treewright.inference import score
from treewright.refine import WordClasses, load_refine_config, refine, signature
from treewright.corpus import read_corpus
from treewright.demo import demo_data_dir
from treewright.vocab import Vocabulary

# Frequent words, and rare capitalised names ending in -ek and -an (one occurrence each).
_TREES = [
    "(ROOT (S (NP (N dorva)) (VP (V selim) (NP (N tasko)))))",
    "(ROOT (S (NP (N tasko)) (VP (V selim) (NP (N dorva)))))",
    "(ROOT (S (NP (N dorva)) (VP (V merun) (NP (N tasko)))))",
    "(ROOT (S (NP (NAME Orvek)) (VP (V selim) (NP (N tasko)))))",
    "(ROOT (S (NP (NAME Hastek)) (VP (V merun) (NP (N dorva)))))",
    "(ROOT (S (NP (NAME Belvek)) (VP (V selim) (NP (N dorva)))))",
    "(ROOT (S (NP (NAME Toran)) (VP (V merun) (NP (N tasko)))))",
    "(ROOT (S (NP (NAME Kelian)) (VP (V selim) (NP (N tasko)))))",
]


def _refine(tmp_path, train, extra=()):
    cfg = load_refine_config(None, ["data.start=treebank", f"data.train={train}",
                                    "data.rare_count=1",
                                    "data.signature_min_count=2", "refine.cycles=1",
                                    "refine.em_iterations=2", "refine.smoothed_iterations=1",
                                    f"output.run_dir={tmp_path / 'run'}",
                                    "output.stdout_metrics=false", "output.parse_f1=false",
                                    *extra])
    return refine(cfg, tmp_path / "run", stream=io.StringIO())


@pytest.fixture(scope="module")
def refined(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("shapes")
    (tmp / "train.trees").write_text("\n".join(_TREES) + "\n", encoding="utf-8")
    # The same trees held out: every tree is a training tree, as the reference below assumes.
    result = _refine(tmp, tmp / "train.trees", [f"data.dev={tmp / 'train.trees'}"])
    training_words = [w for t in _TREES for w in t.replace(")", " ").split() if "(" not in w]
    return load_grammar(result.grammar_path), WordClasses.fit(training_words, 1, 2)


def _read_as(grammar, word: str) -> str:
    w = grammar.vocab.lookup(word)
    return "<none>" if w < 0 else grammar.vocab.words[w]


def test_unseen_words_take_the_class_training_gave_them(refined):
    grammar, classes = refined
    assert grammar.vocab.shapes == 1
    # Hand-worked from the cue rules: capital first letter, ending -ek / -an.
    assert _read_as(grammar, "Zumek") == "⟪Capital·…ek⟫"
    assert _read_as(grammar, "Porosan") == "⟪Capital·…an⟫"
    # A shape the treebank never kept as a class, and no shape at all: the unknown word.
    assert _read_as(grammar, "zumek") == "<unk>"
    assert _read_as(grammar, "ko") == "<unk>"
    # Known words stay themselves; a word written like a class name is never itself.
    assert _read_as(grammar, "tasko") == "tasko"
    assert _read_as(grammar, "⟪Capital·…ek⟫") == "<unk>"
    # Reference: signature() and the training-time mapping WordClasses agree on every word.
    for word in ["Zumek", "Porosan", "Vessek", "zumek", "Ko-tan", "A1", "tasko", "dorva",
                 "Orvek", "⟪Capital·…ek⟫", "<unk>", "Q"]:
        assert _read_as(grammar, word) == classes(word)
        if word not in classes.known and signature(word) in classes.signatures:
            assert _read_as(grammar, word) == signature(word)


def test_sentences_with_unseen_names_parse(refined):
    grammar, _ = refined
    scores = score(grammar, [["Zumek", "selim", "tasko"], ["Porosan", "merun", "dorva"]],
                   dtype=torch.float64)
    assert all(s.parsed for s in scores)
    plain = _without_shapes(grammar)
    # Without the saved mapping both names would be <unk>, which no rule emits here.
    assert not any(s.parsed for s in score(plain, [s.words for s in scores],
                                           dtype=torch.float64))


def _without_shapes(grammar):
    text = grammar.to_text().splitlines()
    kept = [line for line in text if not line.startswith(("@word-shapes", "@format",
                                                          "# checksum"))]
    return parse_grammar("\n".join(kept))


def test_text_and_json_round_trips_keep_the_mapping(refined, tmp_path):
    grammar, classes = refined
    text = grammar.to_text()
    assert "@word-shapes 1" in text.splitlines()
    again = parse_grammar(text)
    (tmp_path / "g.json").write_text(grammar_json_text(grammar), encoding="utf-8")
    from_json = load_grammar_json(tmp_path / "g.json")
    for g in (again, from_json):
        assert g.vocab.shapes == 1
        for word in ["Zumek", "Porosan", "zumek", "tasko"]:
            assert _read_as(g, word) == classes(word)
    data = json.loads(grammar_json_text(grammar))
    assert data["word_shapes"] == 1
    del data["word_shapes"]  # an export written before the field existed: no shapes
    from treewright.export.jsonformat import grammar_from_json
    assert grammar_from_json(data).grammar.vocab.shapes is None


def test_the_directive_keeps_the_format_checks():
    body = '@start S\n@word-shapes {}\nS -> A A 1.0\nA -> "a" 1.0\n'
    assert parse_grammar(body.format(1)).vocab.shapes == 1
    for bad in ("2", "one", "1 2"):
        with pytest.raises(InputError) as err:
            parse_grammar(body.format(bad), source="g.pcfg")
        assert err.value.line == 2 and "g.pcfg" in str(err.value)
    with pytest.raises(InputError):
        parse_grammar('@start S\n@word-shapes\nS -> A A 1.0\nA -> "a" 1.0\n')
    with pytest.raises(ValueError):
        Vocabulary(["a"], shapes=2)


def test_the_refined_demo_grammar_parses_the_test_sentences_it_failed_on(tmp_path):
    data = demo_data_dir()
    # As configs/refine_demo_treebank.yaml does, with the default word classes.
    result = _refine(tmp_path, data / "dev.trees", ["data.signature_min_count=3",
                                                    "data.heldout_fraction=0.2"])
    grammar = load_grammar(result.grammar_path)
    test = [s.tokens for s in read_corpus(data / "test.txt").sentences]
    before = score(_without_shapes(grammar), test)
    after = score(grammar, test)
    failed = [k for k, s in enumerate(before) if not s.parsed]
    assert len(failed) > 10  # the defect: sentences with an unseen name or form
    assert all(after[k].parsed for k in failed)
