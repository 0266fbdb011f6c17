"""The neural bilexicalized PCFG parameterization (Yang, Zhao & Tu 2021): proper distributions,
the back-off mixture, the inspection of word pairs against dense tables, decoding, and training
end to end through `treewright train` on the demo text."""

from __future__ import annotations

import functools
import itertools
import json
import math
from pathlib import Path

import pytest
import torch

from _brute import lexicalized_summary
from treewright.cli import main
from test_lexicalized import is_projective_tree
from treewright.decode import decode_heads
from treewright.grammar import load_grammar
from treewright.induce import load_lexicalized
from treewright.inference import pad_ids
from treewright.params import PARAMETERIZATIONS, LexicalizedParams, symbol_names
from treewright.train.config import ConfigError, load_train_config
from treewright.vocab import Vocabulary

CONFIG = Path(__file__).resolve().parents[1] / "configs" / "lexicalized_demo.yaml"
DEMO_TRAIN = Path(__file__).resolve().parents[1] / "src/treewright/data/demo/train.txt"


def _model(vocab=5, seed=0, nt=2, t=3, classes=3):
    model = LexicalizedParams(nt, t, vocab, classes, dim=8, blocks=1,
                              generator=torch.Generator().manual_seed(seed),
                              dtype=torch.float64)
    with torch.no_grad():   # spread the distributions so that the checks are not near-uniform
        for p in (model.symbol_embeddings, model.word_embeddings, model.class_embeddings):
            p.mul_(4.0)
        model.backoff_logits.copy_(torch.linspace(-1.0, 1.0, nt))
    return model


def test_registered_under_its_config_name():
    assert PARAMETERIZATIONS["lexicalized"] is LexicalizedParams


def test_config_refuses_a_memory_budget_it_cannot_estimate():
    # engine.memory counts the dense and low-rank engines only; a budget would cap batches by
    # the wrong (n^3) formula, so the config says so before anything runs.
    base = [f"data.train={DEMO_TRAIN}", "model.parameterization=lexicalized",
            "train.method=gradient"]
    with pytest.raises(ConfigError, match="memory_budget_mb"):
        load_train_config(None, base + ["train.memory_budget_mb=100"])
    cfg = load_train_config(None, base)
    assert cfg.model.head_classes == 16


def test_every_distribution_sums_to_one():
    # A PCFG's rules for one parent sum to one (common practice); here the factors of the
    # decomposition, each of which the engine docstring requires to be normalised.
    model = _model()
    ones = lambda n: torch.ones(n, dtype=torch.float64)   # noqa: E731
    words = model.word_embeddings
    torch.testing.assert_close(model.head_classes(words).exp().sum(-1), torch.ones(5, 2,
                               dtype=torch.float64))
    torch.testing.assert_close(model.head_children().exp().sum((1, 2)), ones(3))
    torch.testing.assert_close(model.dependent_children().exp().sum(1), ones(3))
    torch.testing.assert_close(model.dependent_words().exp().sum(1), ones(3))
    torch.testing.assert_close(model.root_words().exp().sum(1), ones(5))
    root = model.root_symbols().exp()
    torch.testing.assert_close(torch.stack([root[:2].sum(), root[2:].sum()]), ones(2))
    rules = model.rules()   # the back-off grammar is a proper PCFG
    torch.testing.assert_close(rules.binary.exp().sum((1, 2)), ones(2))
    torch.testing.assert_close(rules.lexical.exp().sum(1), ones(3))
    torch.testing.assert_close(rules.root.exp().sum(), torch.tensor(1.0, dtype=torch.float64))


def test_sentences_of_two_words_carry_the_mass_of_two_preterminal_children():
    # Reference: the definition of the rules summed by hand. A two-word sentence is a root A[x]
    # with two preterminal children, so summing p(x1 x2) over every pair of words gives
    # sum_A p(A) sum_x p(x | A) sum_H p(H | A, x) p(head child in T, either side | H)
    # p(dependent in T | H) (the dependent word's distribution sums to one).
    model = _model()
    pairs = torch.tensor(list(itertools.product(range(5), repeat=2)))
    with torch.no_grad():
        logz, _ = model.log_partition(pairs, torch.full((25,), 2))
        nt = 2
        root = model.root_symbols()[:nt, None] + model.root_words()[:nt]          # (NT, V)
        head = model.head_classes(model.word_embeddings).transpose(0, 1)        # (NT, V, R)
        child_t = torch.logsumexp(model.head_children()[:, :, nt:].flatten(1), 1)  # (R,)
        dep_t = torch.logsumexp(model.dependent_children()[:, nt:], 1)          # (R,)
        mass = torch.logsumexp((root[:, :, None] + head + child_t + dep_t).flatten(), 0)
    assert math.isclose(float(torch.logsumexp(logz, 0)), float(mass), abs_tol=1e-12)
    assert float(mass) < 0.0


def test_log_partition_equals_enumeration_of_the_model_factors():
    # Reference: every lexicalized tree enumerated (tests/_brute.py) over the factors the model
    # gathers for each sentence; an unknown word (-1) leaves its sentence without a parse.
    model = _model()
    ids = torch.tensor([[0, 3, 1, 4], [2, 2, 0, 0], [1, 0, 0, 0], [0, -1, 2, 0]])
    lengths = torch.tensor([4, 2, 1, 3])
    with torch.no_grad():
        logz, kl = model.log_partition(ids, lengths)
        factors = model.factors(ids, lengths)
    assert kl is None
    for b in range(3):
        brute = lexicalized_summary(factors, b, int(lengths[b]))
        assert math.isclose(float(logz[b]), brute["logz"], abs_tol=1e-9)
    assert logz[3] == float("-inf")
    scorer = model.scorer()
    torch.testing.assert_close(scorer.log_likelihood(ids, lengths), logz)
    _, spans = scorer.span_posteriors(ids[:1], lengths[:1])
    # The whole sentence is always a constituent, one word never (width 1 is not scored).
    assert math.isclose(float(spans[0, 0, 4]), 1.0, abs_tol=1e-9)


def test_backoff_is_the_stated_mixture():
    # Reference: the mixture's definition, lambda p_word + (1 - lambda) p_sym, term by term.
    model = _model()
    words = model.word_embeddings
    with torch.no_grad():
        lam = model.backoff_weights()                                            # (NT,)
        mixed = model.head_classes(words).exp()
        by_hand = (lam[:, None] * model.word_classes(words).exp()
                   + (1 - lam[:, None]) * model.symbol_classes().exp())
        torch.testing.assert_close(mixed, by_hand)
        # With every lambda at zero the head word no longer matters: each word gets the
        # symbol-only classes, and no word pair is more associated than the back-off says.
        model.backoff_logits.fill_(-60.0)
        torch.testing.assert_close(model.head_classes(words).exp(),
                                   model.symbol_classes().exp().expand(5, -1, -1))
        assert all(abs(s) < 1e-12 for _, _, s in model.strongest_word_pairs(5))


def test_strongest_word_pairs_match_a_dense_table():
    # Reference: the V x V table of scores formed whole by explicit loops (the vocabulary is
    # tiny here); the method forms it two head words at a time.
    model = _model(vocab=7)
    with torch.no_grad():
        head = model.head_classes(model.word_embeddings).exp()                  # (V, NT, R)
        dep = model.dependent_words().exp()                                      # (R, V)
        prior = model.class_prior().exp()                                        # (R,)
        table = {}
        for x in range(7):
            for y in range(7):
                given = sum(float(head[x, a, r] * dep[r, y]) for a in range(2)
                            for r in range(3)) / 2
                backoff = sum(float(prior[r] * dep[r, y]) for r in range(3))
                table[x, y] = math.log(given) - math.log(backoff)
        got = model.strongest_word_pairs(6, chunk=2)
    want = sorted(table.items(), key=lambda kv: -kv[1])[:6]
    assert [(h, d) for h, d, _ in got] == [pair for pair, _ in want]
    for (h, d, s), (_, v) in zip(got, want):
        assert math.isclose(s, v, abs_tol=1e-9)
    subset = torch.tensor([1, 4, 6])
    got = model.strongest_word_pairs(2, candidates=subset, chunk=2)
    inside = sorted(((s, p) for p, s in table.items() if set(p) <= {1, 4, 6}), reverse=True)
    assert [(h, d) for h, d, _ in got] == [p for _, p in inside[:2]]


def test_strongest_head_symbols_match_pointwise_mutual_information():
    # Reference: PMI from the joint p(C, x) = sum_H rho(H) p(C | H) p(x | H), by explicit loops.
    model = _model(vocab=6)
    with torch.no_grad():
        prior = model.class_prior().exp()
        child, dep = model.dependent_children().exp(), model.dependent_words().exp()
        joint = [[sum(float(prior[r] * child[r, c] * dep[r, x]) for r in range(3))
                  for x in range(6)] for c in range(5)]
        total = sum(map(sum, joint))
        pc = [sum(row) / total for row in joint]
        px = [sum(joint[c][x] for c in range(5)) / total for x in range(6)]
        pmi = {(c, x): math.log(joint[c][x] / total) - math.log(pc[c]) - math.log(px[x])
               for c in range(5) for x in range(6)}
        got = model.strongest_head_symbols(4)
    want = sorted(pmi.items(), key=lambda kv: -kv[1])[:4]
    assert [(c, x) for c, x, _ in got] == [p for p, _ in want]
    assert all(math.isclose(s, v, abs_tol=1e-9) for (_, _, s), (_, v) in zip(got, want))


def test_parse_gives_the_best_derivation_with_heads():
    # Reference: the best enumerated derivation of the model's own factors (tests/_brute.py).
    model = _model()
    ids = torch.tensor([[0, 3, 1, 4], [2, 1, 0, 0]])
    lengths = torch.tensor([4, 2])
    parses = model.parse(ids, lengths)
    with torch.no_grad():
        factors = model.factors(ids, lengths)
    for b in range(2):
        brute = lexicalized_summary(factors, b, int(lengths[b]))
        assert math.isclose(parses[b].score, brute["best_score"], abs_tol=1e-9)
        assert parses[b].spans == brute["best_spans"]
        assert parses[b].heads == brute["best_heads"]


def test_trains_through_the_command_on_the_demo_text(tmp_path):
    # The demo corpus's first 80 sentences, three epochs: the run finishes, writes the
    # back-off grammar, and the training log-likelihood per word rises from epoch to epoch
    # (gradient ascent on a small step from a random start; the demo config with smaller sizes).
    # Then the trained model is read back and decoded to trees with heads.
    train = tmp_path / "train.txt"
    train.write_text("".join(DEMO_TRAIN.read_text().splitlines(keepends=True)[:80]))
    run = tmp_path / "run"
    assert main(["train", str(CONFIG), f"data.train={train}", "data.dev=null",
                 "model.nonterminals=3", "model.preterminals=6", "model.head_classes=4",
                 "model.embedding_dim=16", "train.epochs=3", "train.dtype=float64",
                 "optimizer.lr=0.01", "optimizer.warmup_steps=0", f"output.run_dir={run}",
                 "output.progress=false", "output.stdout_metrics=false",
                 "output.tensorboard=false"]) == 0
    rows = [json.loads(x) for x in (run / "metrics.jsonl").read_text().splitlines()]
    per_word = [r["train/loglik_per_word"] for r in rows if "train/loglik_per_word" in r]
    assert len(per_word) == 3 and per_word[0] < per_word[1] < per_word[2], per_word
    assert all(r.get("train/unparsed", 0) == 0 for r in rows)
    grammar = load_grammar(run / "grammar.pcfg")
    assert len(grammar.nonterminals) == 3

    # Read back for decoding: the checkpoint's model and the rebuilt vocabulary give the
    # grammar file's numbers again (the file was written from the model in memory).
    loaded = load_lexicalized(run)
    with torch.no_grad():
        rules = loaded.model.rules()
    torch.testing.assert_close(rules.binary, grammar.binary, rtol=0, atol=1e-9)
    torch.testing.assert_close(rules.root, grammar.root, rtol=0, atol=1e-9)
    for word in ("ko", "sa", "."):
        torch.testing.assert_close(rules.lexical[:, loaded.vocab.index[word]],
                                   grammar.lexical[3:, grammar.vocab.index[word]],
                                   rtol=0, atol=1e-9)
    # Three-word openings of demo sentences (enumeration grows fast with length), and a
    # word the vocabulary has not seen (read as the unknown-word token).
    sentences = [line.split()[:3] for line in DEMO_TRAIN.read_text().splitlines()[:3]]
    sentences += [["ko", "unheard-of", "sa"], ["ko", "sa"]]
    parses = loaded.parse(sentences)
    ids, lengths = pad_ids([loaded.vocab.encode(s) for s in sentences])
    with torch.no_grad():
        factors = loaded.model.factors(ids, lengths)
    for b, (words, parse) in enumerate(zip(sentences, parses)):
        assert parse.tree.leaves() == words
        # Reference: the best derivation of the enumeration (tests/_brute.py).
        brute = lexicalized_summary(factors, b, len(words))
        assert math.isclose(parse.score, brute["best_score"], abs_tol=1e-9)
        assert parse.heads == brute["best_heads"]
        assert is_projective_tree(parse.heads)


def test_arc_length_bias_weighs_every_dependency_by_the_words_it_spans():
    # Reference: every lexicalized tree enumerated (tests/_brute.py), each weighted by the
    # model's rules and, for every dependency (a binary node: its head word h takes the
    # dependent word dh), by the weight times the number of words strictly between h and dh,
    # the locality bias of Smith & Eisner 2006 (bias.arc_length). Also under deterministic
    # annealing, where a derivation (its tree and the latent class at each node) weighs
    # p(d)^beta, the bias included.
    from _brute import lexicalized_trees
    model = _model()
    ids = torch.tensor([[0, 3, 1, 4], [2, 2, 0, 0], [1, 0, 4, 0]])
    lengths = torch.tensor([4, 2, 3])
    weight = -0.9
    for beta in (1.0, 0.5):
        with torch.no_grad():
            logz, _ = model.log_partition(ids, lengths, arc_length=weight, beta=beta)
            plain, _ = model.log_partition(ids, lengths, beta=beta)
            f = model.factors(ids, lengths)
        for b, n in enumerate(lengths.tolist()):
            node = functools.lru_cache(maxsize=None)(
                lambda h, a, side, hsym, dsym, dh: float(torch.logsumexp(beta * (
                    f.head[b, h, a] + f.head_child[:, side, hsym] + f.dep_child[:, dsym]
                    + f.dep_word[b, dh]), 0)))
            terms = []
            for a, h, nodes, _ in lexicalized_trees(n, model.nonterminals, model.preterminals):
                logp = beta * float(f.root[b, h, a])
                for i, j, a_, h_, side, hsym, dsym, dh in nodes:
                    logp += node(h_, a_, side, hsym, dsym, dh)
                    logp += beta * weight * (abs(h_ - dh) - 1)
                terms.append(logp)
            want = float(torch.logsumexp(torch.tensor(terms, dtype=torch.float64), 0)) / beta
            assert math.isclose(float(logz[b]), want, rel_tol=0, abs_tol=1e-9)
            if n > 2:   # two words are always neighbours: the bias is a no-op there alone
                assert abs(float(logz[b]) - float(plain[b])) > 1e-3
            else:
                assert math.isclose(float(logz[b]), float(plain[b]), rel_tol=0, abs_tol=1e-12)


def test_decode_heads_reports_a_sentence_it_cannot_parse():
    # A vocabulary with no unknown-word token: a new word has no rule, so its sentence has no
    # parse and says so (tree None), while the others are decoded in input order.
    model = _model(vocab=3)
    vocab = Vocabulary(["ta", "mo", "sul"], unk=None)
    names = symbol_names(2, 3)
    out = decode_heads(model, vocab, [["ta", "mo", "sul"], ["ta", "vesk"], ["sul"]], *names)
    assert out[1].tree is None and out[1].heads == [] and out[1].score == float("-inf")
    assert out[0].tree.leaves() == ["ta", "mo", "sul"] and is_projective_tree(out[0].heads)
    assert out[2].tree.leaves() == ["sul"] and out[2].heads == [0]


def test_head_bias_weighs_every_dependent_by_the_word_that_takes_it():
    # Reference: every lexicalized tree enumerated (tests/_brute.py), each weighted by the
    # model's rules and, at every binary node, by the bias of its head word's position: a
    # binary node is where its head word takes one dependent (bias.head_weight).
    from _brute import lexicalized_trees
    model = _model()
    ids = torch.tensor([[0, 3, 1, 4], [2, 2, 0, 0]])
    lengths = torch.tensor([4, 2])
    bias = torch.tensor([[-1.5, 0.0, 0.7, -3.0], [0.4, -2.0, 0.0, 0.0]], dtype=torch.float64)
    with torch.no_grad():
        logz, _ = model.log_partition(ids, lengths, head_bias=bias)
        plain, _ = model.log_partition(ids, lengths)
        f = model.factors(ids, lengths)
    for b, n in enumerate(lengths.tolist()):
        terms = []
        for a, h, nodes, _ in lexicalized_trees(n, model.nonterminals, model.preterminals):
            logp = float(f.root[b, h, a])   # the model has no preterminal score (terminal None)
            for i, j, a_, h_, side, hsym, dsym, dh in nodes:
                logp += float(torch.logsumexp(f.head[b, h_, a_] + f.head_child[:, side, hsym]
                                              + f.dep_child[:, dsym] + f.dep_word[b, dh], 0))
                logp += float(bias[b, h_])
            terms.append(logp)
        want = float(torch.logsumexp(torch.tensor(terms, dtype=torch.float64), 0))
        assert math.isclose(float(logz[b]), want, rel_tol=0, abs_tol=1e-9)
        assert abs(float(logz[b]) - float(plain[b])) > 1e-3   # the bias is not a no-op here
