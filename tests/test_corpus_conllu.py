"""CoNLL-U reading: the Turkish Web Treebank (turkish-treebanks on PyPI, Apache-2.0) and small
hand-made files. Expected counts are computed here independently of the reader."""

from __future__ import annotations

import itertools
import os
import sysconfig

import pytest

from treewright.corpus import (ReadOptions, check_tree, dependency_to_tree, lift_to_projective,
                               nonprojective_arcs, read_corpus)
from treewright.errors import InputError

DATA = os.path.join(os.path.dirname(__file__), "data", "corpus")


def treebank(section: str) -> str:
    path = os.path.join(sysconfig.get_paths()["purelib"], "data", f"{section}.conllu")
    if not os.path.exists(path):
        pytest.skip("turkish-treebanks is not installed")
    return path


def plain_blocks(path: str) -> list[list[tuple[int, int, str]]]:
    """Independent reference: (id, head, upos) of integer-id word lines, per blank-line block."""
    blocks, block = [], []
    with open(path, encoding="utf-8") as handle:
        for line in handle:
            line = line.rstrip("\n")
            if not line.strip():
                if block:
                    blocks.append(block)
                block = []
            elif not line.startswith("#"):
                fields = line.split("\t")
                if fields[0].isdigit():
                    block.append((int(fields[0]), int(fields[6]), fields[3]))
    if block:
        blocks.append(block)
    return blocks


def crossing(heads: list[int]) -> bool:
    """Brute force: two arcs cross (root arcs from position 0 included). A tree is
    projective iff no two of its arcs cross (common practice)."""
    arcs = [(min(h, d), max(h, d)) for d, h in enumerate(heads, start=1)]
    return any(a < c < b < e or c < a < e < b for (a, b), (c, e) in itertools.combinations(arcs, 2))


def brute_yield(heads: list[int], word: int) -> set[int]:
    """The 1-based words whose head chain passes through `word` (brute force)."""
    out = set()
    for w in range(1, len(heads) + 1):
        node = w
        while node not in (0, word):
            node = heads[node - 1]
        if node == word:
            out.add(w)
    return out


@pytest.fixture(scope="module")
def web():
    path = treebank("web")
    return path, plain_blocks(path), read_corpus(path)


def test_web_counts_match_a_plain_count(web):
    path, blocks, corpus = web
    report = corpus.report
    # Reference: a plain count of blank-line-separated blocks and integer-id word lines.
    assert report.sentences_read == len(blocks)
    nonproj = sum(crossing([h for _, h, _ in b]) for b in blocks)
    # Reference: brute-force crossing-arc check on every sentence.
    assert report.nonprojective == nonproj > 0
    assert report.skipped_by_reason == {"nonprojective": nonproj}
    assert report.sentences_used == len(blocks) - nonproj
    used_tokens = sum(len(b) for b in blocks if not crossing([h for _, h, _ in b]))
    assert report.tokens == used_tokens
    assert report.sentences_used + report.sentences_skipped == report.sentences_read


def test_web_projective_trees_have_nesting_spans(web):
    _, blocks, corpus = web
    projective = [b for b in blocks if not crossing([h for _, h, _ in b])]
    assert len(projective) == len(corpus.sentences)
    for block, sentence in zip(projective, corpus.sentences):
        heads = [h for _, h, _ in block]
        assert sentence.heads == heads
        assert sentence.tree.leaves() == sentence.words
        spans = {(i, j) for i, j, _ in sentence.tree.labeled_spans()}
        # Common practice: in a projective tree every subtree yield is contiguous ...
        expected = {(i, i + 1) for i in range(len(heads))}
        for word in range(1, len(heads) + 1):
            members = brute_yield(heads, word)
            lo, hi = min(members), max(members)
            assert hi - lo + 1 == len(members)
            expected.add((lo - 1, hi))
        if sum(h == 0 for h in heads) > 1:
            expected.add((0, len(heads)))
        assert spans == expected
        # ... and the yields nest: no two spans cross (brute force over pairs).
        for (a, b), (c, d) in itertools.combinations(spans, 2):
            assert not (a < c < b < d or c < a < d < b)
        # Preterminals carry the UPOS column, and so do the exposed tags.
        upos = [u for _, _, u in block]
        assert sentence.tags == upos
        assert [n.label for n in sentence.tree.subtrees() if n.is_preterminal()] == upos


def test_web_lift_makes_every_sentence_projective(web):
    path, blocks, _ = web
    corpus = read_corpus(path, options=ReadOptions(nonprojective="lift"))
    nonproj = sum(crossing([h for _, h, _ in b]) for b in blocks)
    assert corpus.report.projectivised == corpus.report.nonprojective == nonproj
    assert corpus.report.sentences_used == len(blocks)
    for sentence in corpus.sentences:
        lifted = lift_to_projective(sentence.heads)
        assert check_tree(lifted) is None
        assert not crossing(lifted)  # brute-force reference
        spans = [(i, j) for i, j, _ in sentence.tree.labeled_spans()]
        for (a, b), (c, d) in itertools.combinations(spans, 2):
            assert not (a < c < b < d or c < a < d < b)


def test_wiki_section_reads():
    path = treebank("wiki")
    blocks = plain_blocks(path)
    corpus = read_corpus(path, options=ReadOptions(nonprojective="lift"))
    # Reference: plain block and word-line counts.
    assert corpus.report.sentences_read == len(blocks)
    assert corpus.report.tokens == sum(len(b) for b in blocks)


def test_nonprojective_arcs_agree_with_crossing_on_all_small_trees():
    # Brute force over every head assignment of 1..5 words that forms a tree.
    for n in range(1, 6):
        for heads in itertools.product(range(n + 1), repeat=n):
            heads = list(heads)
            if check_tree(heads) is not None:
                continue
            assert bool(nonprojective_arcs(heads)) == crossing(heads), heads
            assert not crossing(lift_to_projective(heads))


def test_multiword_tokens_and_empty_nodes_use_syntactic_words():
    corpus = read_corpus(os.path.join(DATA, "mwt_empty.conllu"))
    first, second = corpus.sentences
    # Hand-made file: the range line 2-3 and the empty node 3.1 are not syntactic words.
    assert first.words == ["Velmaro", "duni", "kar", "."]
    assert first.tags == ["PROPN", "ADP", "VERB", "PUNCT"]
    assert first.line == 1 and second.line == 11  # hand-counted in the file
    assert first.tree.to_string() == \
        "(VERB (PROPN Velmaro) (ADP duni) (VERB kar) (PUNCT .))"
    assert second.tree.to_string() == "(NOUN (NOUN Osk) (ADJ tame))"
    tagged = read_corpus(os.path.join(DATA, "mwt_empty.conllu"),
                         options=ReadOptions(tag_mode=True, dependency_labels="fixed"))
    assert tagged.sentences[0].tokens == ["PROPN", "ADP", "VERB", "PUNCT"]
    assert tagged.sentences[1].tree.to_string() == "(X (NOUN Osk) (ADJ tame))"


def test_several_roots_get_a_sentence_span():
    tree = dependency_to_tree(["a", "b", "c"], ["N", "V", "N"], [0, 0, 2])
    # Hand-worked: roots a and b; c depends on b.
    assert tree.to_string() == "(X (N a) (V (V b) (N c)))"


BAD_CONLLU = [
    ("1\tOsk\tosk\tNOUN\t_\t_\t0\troot\t_\t_\n2\ttame\ttame\n", 2, "10 tab-separated"),
    ("1\tOsk\tosk\tNOUN\t_\t_\t0\troot\t_\t_\n3\ttame\ttame\tADJ\t_\t_\t1\tamod\t_\t_\n", 2,
     "out of order"),
    ("\n\n1\tOsk\tosk\tNOUN\t_\t_\t2\tnsubj\t_\t_\n2\ttame\ttame\tADJ\t_\t_\t1\tamod\t_\t_\n",
     3, "cycle"),
    ("1\tOsk\tosk\tNOUN\t_\t_\tq\troot\t_\t_\n", 1, "cannot read"),
    # A head out of range or a word its own head is named at that word's line.
    ("1\tOsk\tosk\tNOUN\t_\t_\t0\troot\t_\t_\n2\ttame\ttame\tADJ\t_\t_\t7\tamod\t_\t_\n", 2,
     "word 2 has head 7, outside 0..2"),
    ("1\tOsk\tosk\tNOUN\t_\t_\t0\troot\t_\t_\n2\ttame\ttame\tADJ\t_\t_\t2\tamod\t_\t_\n", 2,
     "word 2 is its own head"),
    # A cycle is named at its first word (here the second of the sentence).
    ("1\tOsk\tosk\tNOUN\t_\t_\t0\troot\t_\t_\n2\ttame\ttame\tADJ\t_\t_\t3\tamod\t_\t_\n"
     "3\tvel\tvel\tADJ\t_\t_\t2\tamod\t_\t_\n", 2, "words [2, 3] form a cycle"),
]


@pytest.mark.parametrize("text,line,words", BAD_CONLLU)
def test_malformed_conllu_names_file_and_line(tmp_path, text, line, words):
    path = tmp_path / "bad.conllu"
    good = "1\tVel\tvel\tNOUN\t_\t_\t0\troot\t_\t_\n\n"
    path.write_text(good + text, encoding="utf-8")
    with pytest.raises(InputError) as err:
        read_corpus(path)
    assert err.value.path == str(path) and err.value.line == line + 2
    assert f"{path}, line {line + 2}" in str(err.value) and words in str(err.value)
    corpus = read_corpus(path, options=ReadOptions(skip_bad=True))
    # Nothing goes missing: one used, one listed as malformed at the right line.
    assert corpus.report.sentences_read == 2 and corpus.report.sentences_used == 1
    assert [(r.reason, r.line) for r in corpus.report.skipped] == [("malformed", line + 2)]


def test_dropping_tagged_words_renumbers_heads_or_gives_them_up(tmp_path):
    # Hand-made sentences (an invented language): 1 <- 2 -> 3(PUNCT) with 2 the root, and
    # 1 <- 2(PUNCT) -> 3 with the punctuation as the root.
    from treewright.corpus import ReadOptions, read_corpus
    text = ("1\tvel\tvel\tNOUN\t_\t_\t2\tnsubj\t_\t_\n"
            "2\tdoran\tdoran\tVERB\t_\t_\t0\troot\t_\t_\n"
            "3\t.\t.\tPUNCT\t_\t_\t2\tpunct\t_\t_\n\n"
            "1\tsel\tsel\tNOUN\t_\t_\t2\tdep\t_\t_\n"
            "2\tka\tka\tPUNCT\t_\t_\t0\troot\t_\t_\n"
            "3\tmor\tmor\tVERB\t_\t_\t2\tdep\t_\t_\n\n")
    path = tmp_path / "two.conllu"
    path.write_text(text)
    corpus = read_corpus(path, "conllu", ReadOptions(punct_labels=frozenset({"PUNCT"})))
    first, second = corpus.sentences
    assert first.words == ["vel", "doran"] and first.heads == [2, 0]   # renumbered by hand
    assert second.words == ["sel", "mor"] and second.tags == ["NOUN", "VERB"]
    assert second.heads is None        # both words hung from the removed one: none invented


def test_training_option_drop_tags_reaches_train_and_dev(tmp_path):
    from treewright.train import load_train_config
    from treewright.train.loop import load_data
    text = ("1\tvel\tvel\tNOUN\t_\t_\t2\tnsubj\t_\t_\n"
            "2\tdoran\tdoran\tVERB\t_\t_\t0\troot\t_\t_\n"
            "3\t.\t.\tPUNCT\t_\t_\t2\tpunct\t_\t_\n\n")
    path = tmp_path / "one.conllu"
    path.write_text(text)
    cfg = load_train_config(None, [f"data.train={path}", f"data.dev={path}",
                                   "data.drop_tags=PUNCT, SYM"])
    data = load_data(cfg)
    assert "." not in data.vocab.index
    assert data.dev_words == [["vel", "doran"]]
    assert data.dev_trees[0].leaves() == ["vel", "doran"]
