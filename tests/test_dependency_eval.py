"""Attachment scoring (`evaluate_attachment`) against independent references.

References: small cases worked by hand in the comments; the chain baselines on the Turkish Web
Treebank `web` section (PyPI turkish-treebanks, Apache-2.0; read here with the `conllu` package
directly) against a plain count written in this file over the gold arcs as undirected edge sets
(and, for NED, over each word's gold parent and grandparent, as Schwartz, Abend, Reichart &
Rappoport 2011 define it; the definition from memory);
scikit-learn's `accuracy_score` over the flattened head lists for directed accuracy. Toy words
are Kethravi (the invented demo language).
"""

from __future__ import annotations

import json
import os
import random
import sysconfig

import pytest

from treewright.errors import InputError
from treewright.evaluation import (BracketConventions, Dependencies, evaluate_attachment,
                                   left_chain, right_chain)

WEB = os.path.join(sysconfig.get_paths()["purelib"], "data", "web.conllu")

# Sentence 1: "ko brosk , tulm dorvik ." (the barge, the salt bought .), words 3 and 6 are
# punctuation. Gold: ko -> brosk, brosk -> dorvik, "," -> dorvik, tulm -> dorvik, dorvik root,
# "." -> dorvik.
S1 = Dependencies(("ko", "brosk", ",", "tulm", "dorvik", "."), (2, 5, 5, 5, 0, 5),
                  ("DET", "N", "PUNCT", "N", "VT", "PUNCT"), line=1)
# Sentence 2: "sa Orvek : tullik", word 3 is punctuation and word 1's gold head is that ":".
S2 = Dependencies(("sa", "Orvek", ":", "tullik"), (3, 4, 4, 0), ("ART", "NAME", "PUNCT", "VI"),
                  line=9)
# Predictions. S1: [0, 1, 4, 2, 2, 1] (a tree rooted at word 1); S2: [3, 4, 4, 0].
P1, P2 = [0, 1, 4, 2, 2, 1], [3, 4, 4, 0]


def test_hand_worked_model_and_chains():
    result = evaluate_attachment([P1, P2], [S1, S2])
    model, left, right = (result.systems[k] for k in ("model", "left_chain", "right_chain"))
    # Hand-worked, scored words S1: 1, 2, 4, 5; S2: 1, 2, 4 (7 words).
    # Model S1: w1 0 vs 2 wrong (an arc to the root matches only a gold root arc);
    #   w2 1 vs 5 wrong, undirected right (gold head of 1 is 2); w4 2 vs 5 wrong both (gold head
    #   of 2 is 5, not 4); w5 2 vs 0 wrong, undirected right (gold head of 2 is 5).
    # Model S2: w1 3 = 3 right (a gold head that is punctuation is scored as it stands),
    #   w2 4 = 4, w4 0 = 0: 3 right.
    # Directed 3/7, undirected 5/7. NED adds no word here: S1 w1's gold grandparent is 5
    #   (head 0 predicted), w4's is the root (head 2 predicted). 5/7.
    assert (model.directed_correct, model.undirected_correct, model.words) == (3, 5, 7)
    assert (model.ned_correct, model.ned) == (5, pytest.approx(5 / 7))
    assert model.directed == pytest.approx(3 / 7) and model.undirected == pytest.approx(5 / 7)
    # Left chain S1 over 1, 2, 4, 5: heads 0, 1, 2, 4. Directed none; undirected w2 (gold head
    #   of 1 is 2) and w5 (gold head of 4 is 5). S2 over 1, 2, 4: heads 0, 1, 2; undirected w4
    #   only (gold head of 2 is 4). Directed 0/7, undirected 3/7.
    assert (left.directed_correct, left.undirected_correct) == (0, 3)
    # Right chain S1: heads 2, 4, 5, 0: w1, w4, w5 right, w2 wrong both (gold head of 4 is 5).
    #   S2: heads 2, 4, 0: w1 wrong both (gold head of 2 is 4), w2 and w4 right. 5/7 and 5/7.
    assert (right.directed_correct, right.undirected_correct) == (5, 5)
    # NED of the chains. Left S1: only the undirected w2 and w5 (w1's head 0 is neither its
    #   gold parent 2 nor its grandparent 5; w4's head 2 is neither 5 nor 0). Left S2: w4
    #   undirected, and w1, whose head is the root and whose gold parent 4 is the root word:
    #   its grandparent. 4/7. Right S1: w2's head 4 is neither 5 nor 0, so the directed 3;
    #   right S2: w1's head 2 is neither 4 nor 0, so the directed 2. 5/7.
    assert (left.ned_correct, right.ned_correct) == (4, 5)
    c = result.counts
    assert (c["read"], c["evaluated"], c["words_scored"], c["punctuation_words_not_scored"],
            c["gold_heads_past_punctuation"]) == (2, 2, 7, 3, 1)


def test_chain_heads_name_their_root():
    # The brief's definition: left chain, each word's head is the word before it and the first
    # word is the root; right chain, the word after it and the last word is the root.
    assert left_chain([1, 2, 3, 4], 4) == [0, 1, 2, 3]
    assert right_chain([1, 2, 3, 4], 4) == [2, 3, 4, 0]
    # Punctuation (words 2 and 5 not scored) is skipped: word 3's head is word 1.
    assert left_chain([1, 3, 4], 5) == [0, 0, 1, 3, 0]
    assert right_chain([1, 3, 4], 5) == [3, 0, 4, 0, 0]


def test_tokens_decide_punctuation_without_tags():
    # Without tags the tokens decide (",", ".", ":" are in the default punctuation tokens):
    # the same scored words, so the same counts as the hand-worked test.
    bare = [Dependencies(s.words, s.heads, None, s.line) for s in (S1, S2)]
    model = evaluate_attachment([P1, P2], bare).systems["model"]
    assert (model.directed_correct, model.undirected_correct, model.words) == (3, 5, 7)


def test_keeping_punctuation_scores_every_word():
    result = evaluate_attachment([P1, P2], [S1, S2], BracketConventions(remove_punctuation=False))
    model, left = result.systems["model"], result.systems["left_chain"]
    # Hand-worked, 10 words. Model adds S1 w3 (4 vs 5; gold head of 4 is 5: wrong both), S1 w6
    # (1 vs 5; gold head of 1 is 2: wrong both), S2 w3 (4 = 4: right): 4/10 and 6/10.
    assert (model.directed_correct, model.undirected_correct, model.words) == (4, 6, 10)
    # Left chain over all words. S1 heads 0..5: w2 undirected (gold 1 -> 2), w5 undirected
    # (gold 4 -> 5), w6 right (5 = 5). S2 heads 0..3: w4 undirected (gold 3 -> 4). 1/10, 4/10.
    assert (left.directed_correct, left.undirected_correct) == (1, 4)
    assert result.counts["punctuation_words_not_scored"] == 0


def test_unparsed_prediction_counts_wrong_and_max_length_leaves_out():
    # S1 unparsed: its 4 scored words are wrong; S2 as hand-worked: 3/7 directed.
    model = evaluate_attachment([None, P2], [S1, S2]).systems["model"]
    assert (model.directed_correct, model.undirected_correct, model.words) == (3, 3, 7)
    # max_length 3 counts scored words: S1 has 4 and is left out, S2 has 3.
    result = evaluate_attachment([P1, P2], [S1, S2], BracketConventions(max_length=3))
    assert result.counts["longer_than_max_length"] == 1
    assert result.systems["model"].words == 3 and result.systems["model"].directed_correct == 3


def test_punctuation_taken_out_of_both_trees():
    # S2 without ":" (gold ":" -> tullik): sa -> tullik, Orvek -> tullik, tullik root. A
    # prediction attaching sa to tullik directly is right for all 3 words, as is P2, whose sa ->
    # ":" -> tullik passes through the punctuation (hand-worked).
    for pred in ([4, 4, 4, 0], P2):
        result = evaluate_attachment([pred], [S2])
        assert result.systems["model"].directed_correct == 3
    assert result.counts["gold_heads_past_punctuation"] == 1
    assert result.counts["predicted_heads_past_punctuation"] == 1
    # A prediction whose chain loops among punctuation words (a mark headed by itself is
    # refused as input, so the loop takes two marks): S1 with "," -> "." and "." -> ",", brosk
    # -> ",": brosk has no head once the marks are gone, and counts wrong.
    looped = evaluate_attachment([[2, 3, 6, 5, 0, 3]], [S1]).systems["model"]
    # Hand-worked: ko 2 = 2 right; brosk wrong; tulm 5 = 5; dorvik 0 = 0: 3 of 4. Undirected:
    # brosk's arc is gone, so also 3.
    assert (looped.directed_correct, looped.undirected_correct, looped.words) == (3, 3, 4)


def test_predictions_over_the_words_left_without_punctuation():
    # P1 and P2 written over the words left (S1: ko brosk tulm dorvik; S2: sa Orvek tullik),
    # indices over those words: P1 heads 0, 1, 2, 2 become 0, ko, brosk, brosk, as in P1; P2
    # attaches sa and Orvek to tullik (word 3 of 3), tullik to the root.
    short = [[0, 1, 2, 2], [3, 3, 0]]
    model = evaluate_attachment(short, [S1, S2]).systems["model"]
    # The same as the hand-worked full-sentence predictions: 3/7 and 5/7.
    assert (model.directed_correct, model.undirected_correct, model.words) == (3, 5, 7)
    words = [Dependencies(("ko", "brosk", "tulm", "dorvik"), (0, 1, 2, 2)),
             Dependencies(("sa", "Orvek", "tullik"), (3, 3, 0))]
    assert evaluate_attachment(words, [S1, S2]).systems["model"] == model


def test_baselines_alone_and_report_text():
    result = evaluate_attachment(None, [S1, S2])
    assert set(result.systems) == {"left_chain", "right_chain"}
    table = evaluate_attachment([P1, P2], [S1, S2]).format_table()
    # 3/7 = 42.9%, 5/7 = 71.4% (hand-worked above), and the conventions are printed.
    assert "42.9" in table and "71.4" in table
    for words in ("the first scored word is the root", "the last scored word is the root",
                  "common practice", "Conventions"):
        assert words in table
    assert json.loads(json.dumps(result.to_dict()))["counts"]["words_scored"] == 7


@pytest.mark.parametrize("pred, gold, message, line", [
    ([P1], [S1, S2], "predictions have 1 sentences", 9),
    ([P1, [4, 0]], [S1, S2], "2 predicted heads for 4 gold words (3 without punctuation)", 2),
    ([P1, [3, 4, 5, 0]], [S1, S2], "outside 0..4", 2),
    ([P1, [1, 4, 4, 0]], [S1, S2], "its own head", 2),
    ([Dependencies(S1.words, tuple(P1), line=40),
      Dependencies(("sa", "Orvek", ";", "tullik"), tuple(P2), line=47)], [S1, S2],
     "predicted word 3 is ';'", 47),
])
def test_mismatches_name_file_and_line(pred, gold, message, line):
    # The line is the sentence's own `line` when it has one, else its 1-based position.
    with pytest.raises(InputError) as err:
        evaluate_attachment(pred, gold, pred_path="pred.conllu", gold_path="gold.conllu")
    assert message in str(err.value) and err.value.line == line
    assert err.value.path in ("pred.conllu", "gold.conllu")


# ---- the Turkish Web Treebank --------------------------------------------------------------


@pytest.fixture(scope="module")
def web():
    if not os.path.exists(WEB):
        pytest.skip("turkish-treebanks is not installed")
    conllu = pytest.importorskip("conllu")
    with open(WEB, encoding="utf-8") as handle:
        parsed = conllu.parse(handle.read())
    out = []
    for sentence in parsed:
        tokens = [t for t in sentence if isinstance(t["id"], int)]  # syntactic words only
        out.append(Dependencies(tuple(t["form"] for t in tokens), tuple(t["head"] for t in tokens),
                                tuple(t["upos"] for t in tokens)))
    return out


def direct_chain_counts(sentences, direction):
    """The chain baseline counted plainly: over the non-PUNCT word ids, each attached to its
    neighbour (previous for "left", next for "right"), the end one to 0; a word is right when
    (word, head) is a gold arc, right undirected when {word, head} is a gold arc's pair of
    ends (the root arc as {word, 0}), and right by NED when head is the word's gold parent or
    grandparent (the root as node 0) or a word whose gold parent it is."""
    directed = undirected = ned = words = 0
    for s in sentences:
        arcs = {(k, h) for k, h in enumerate(s.heads, start=1)}
        edges = {frozenset(a) for a in arcs}
        parent = dict(arcs)
        kept = [k for k, tag in enumerate(s.tags, start=1) if tag != "PUNCT"]
        if direction == "right":
            kept = kept[::-1]
        for position, word in enumerate(kept):
            head = kept[position - 1] if position else 0
            words += 1
            directed += (word, head) in arcs
            undirected += frozenset((word, head)) in edges
            ned += head in (parent[word], parent.get(parent[word])) or parent.get(head) == word
    return directed, undirected, ned, words


def test_chains_on_turkish_match_a_direct_count(web):
    # Only UPOS PUNCT marks punctuation here, as in the direct count. The direct count passes
    # no head through punctuation, which is exact here: no non-PUNCT word of the web section
    # is headed by a PUNCT word (checked plainly).
    assert not any(s.tags[h - 1] == "PUNCT" for s in web for h, tag in zip(s.heads, s.tags)
                   if h and tag != "PUNCT")
    conv = BracketConventions(punctuation_tags=frozenset({"PUNCT"}))
    result = evaluate_attachment(None, web, conv)
    for name, direction in (("left_chain", "left"), ("right_chain", "right")):
        s = result.systems[name]
        assert (s.directed_correct, s.undirected_correct, s.ned_correct, s.words) == \
            direct_chain_counts(web, direction)
    # Turkish is head-final, so the right chain is the stronger baseline (from memory: the
    # usual picture for head-final languages); a sanity check, not the reference.
    assert result.systems["right_chain"].directed > result.systems["left_chain"].directed


def test_directed_accuracy_matches_scikit_learn(web):
    accuracy_score = pytest.importorskip("sklearn.metrics").accuracy_score
    rng = random.Random(7)
    sentences = web[:400]
    # Seeded random heads among 0 and the non-PUNCT words (never the word itself), so that no
    # predicted head passes through punctuation and the flattened lists are the scored arcs.
    pred = []
    for s in sentences:
        kept = [0] + [k for k, tag in enumerate(s.tags, start=1) if tag != "PUNCT"]
        pred.append([rng.choice([h for h in kept if h != k]) for k in range(1, len(s.words) + 1)])
        # Neither does a gold head (checked here: no non-PUNCT word is headed by a PUNCT one).
        assert all(s.tags[h - 1] != "PUNCT" for h, tag in zip(s.heads, s.tags)
                   if h and tag != "PUNCT")
    conv = BracketConventions(punctuation_tags=frozenset({"PUNCT"}))
    model = evaluate_attachment(pred, sentences, conv).systems["model"]
    flat_pred, flat_gold = [], []
    for p, s in zip(pred, sentences):
        for k, tag in enumerate(s.tags):
            if tag != "PUNCT":
                flat_pred.append(p[k])
                flat_gold.append(s.heads[k])
    # scikit-learn: the share of positions where the flattened lists agree.
    assert model.directed == pytest.approx(accuracy_score(flat_gold, flat_pred), abs=1e-12)
    assert model.words == len(flat_gold)
    # Against the gold itself, every word is right (the definition of accuracy).
    gold_self = evaluate_attachment([s.heads for s in sentences], sentences, conv)
    assert gold_self.systems["model"].directed == 1.0 == gold_self.systems["model"].undirected
    assert gold_self.systems["model"].ned == 1.0


def test_ned_forgives_a_change_of_head_convention():
    # The case NED was made for (Schwartz, Abend, Reichart & Rappoport 2011, from memory): a
    # function word and the content word of its phrase trade places as head. Kethravi
    # "pirnak ma tullik" (a harbour at, arrived): gold with content heads, pirnak -> tullik,
    # ma -> pirnak, tullik the root; predicted with the postposition as head, pirnak -> ma,
    # ma -> tullik. w1: reversed arc (gold head of ma is pirnak): undirected and NED. w2: its
    # predicted head tullik is its gold grandparent (ma -> pirnak -> tullik): NED only. w3: the
    # root, right. Directed 1/3, undirected 2/3, NED 3/3.
    gold = [Dependencies(("pirnak", "ma", "tullik"), (3, 1, 0), ("N", "POST", "VI"))]
    model = evaluate_attachment([[2, 3, 0]], gold).systems["model"]
    assert (model.directed_correct, model.undirected_correct, model.ned_correct) == (1, 2, 3)
    # The same at the root: gold ko -> brosk (root), predicted brosk -> ko (root). w1's
    # predicted head, the root, is its gold grandparent; w2's arc is w1's gold arc reversed.
    # Directed 0/2, undirected 1/2, NED 2/2.
    gold = [Dependencies(("ko", "brosk"), (2, 0), ("DET", "N"))]
    model = evaluate_attachment([[0, 1]], gold).systems["model"]
    assert (model.directed_correct, model.undirected_correct, model.ned_correct) == (0, 1, 2)
    # A wrong head that is none of the three: w1 -> w3 where w1's gold parent is w2 and w2's
    # gold parent is the root (gold 2, 0, 2; predicted 3, 0, 2).
    gold = [Dependencies(("ko", "brosk", "ma"), (2, 0, 2), ("DET", "N", "POST"))]
    model = evaluate_attachment([[3, 0, 2]], gold).systems["model"]
    assert (model.directed_correct, model.undirected_correct, model.ned_correct) == (2, 2, 2)
