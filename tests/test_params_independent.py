"""Independent left and right productions (Liu, Yang, Kim & Tu 2023): the engine kernel's log Z,
span marginals and expected rule counts against enumeration of every tree, against the dense
engine run on the rule tensor the factors imply (a second, independent path), the pruned export
against a plain sort of every rule, and training end to end on the demo text."""

from __future__ import annotations

import json
import math

import pytest
import torch

from test_train_fixtures import base_overrides, brute_force, write_corpus
from treewright.demo import demo_data_dir
from treewright.engine.independent import independent_dense_binary, independent_log_partition
from treewright.engine.inside import log_partition
from treewright.errors import InputError
from treewright.grammar import load_grammar
from treewright.inference import encode_ids, score
from treewright.params import (PARAMETERIZATIONS, IndependentParams, IndependentRules,
                               NeuralIndependentParams)
from treewright.params.base import span_posteriors
from treewright.train import load_train_config, train, updates
from treewright.train.estep import independent_counts, make_batch

F64 = torch.float64


def _rules(nt=2, t=3, v=4, seed=0, scale=2.0) -> IndependentRules:
    model = IndependentParams(nt, t, v, init_scale=scale,
                              generator=torch.Generator().manual_seed(seed), dtype=F64)
    with torch.no_grad():
        return model.rules()


def test_factors_are_normalized_and_imply_the_product_rule():
    r = _rules(nt=3, t=4)
    dense = r.binary.exp()                                             # (3, 7, 7)
    left, right = r.left.exp(), r.right.exp()
    # The definition p(A -> B C) = p(B | A, left) p(C | A, right), entry by entry.
    for a in range(3):
        for b in range(7):
            for c in range(7):
                assert math.isclose(float(dense[a, b, c]), float(left[a, b] * right[a, c]),
                                    rel_tol=1e-12)
    # Every parent's binary rules sum to one (a PCFG's definition).
    torch.testing.assert_close(dense.sum((1, 2)), torch.ones(3, dtype=F64), rtol=0, atol=1e-12)
    assert r.binary_rules == 3 * 7 * 7


@pytest.mark.parametrize("words", [[0, 1], [2, 0, 3], [1, 1, 2, 0], [3, 0, 2, 1, 1]])
def test_log_z_spans_and_counts_agree_with_enumeration(words):
    r = _rules()
    dense = r.dense()
    # Reference: every labelled tree enumerated (test_train_fixtures.brute_force).
    logz_bf, root_bf, counts_bf, lexical_bf, spans_bf = brute_force(dense, words)
    ids = torch.tensor([words])
    lengths = torch.tensor([len(words)])
    leaves = [x.detach().clone().requires_grad_() for x in r]
    rules = IndependentRules(*leaves)
    terminal = encode_ids(rules.lexical, ids, lengths).terminal
    logz = rules.log_partition(terminal, lengths)
    assert math.isclose(float(logz.detach()[0]), logz_bf, rel_tol=1e-9, abs_tol=1e-9)
    g_root, g_left, g_right, g_lex = torch.autograd.grad(logz.sum(), leaves)
    # Expected counts are the gradient of log Z with respect to log-probabilities; those of the
    # left factor sum the enumerated rule counts over the right child, and vice versa.
    torch.testing.assert_close(g_left, counts_bf.sum(2), rtol=0, atol=1e-9)
    torch.testing.assert_close(g_right, counts_bf.sum(1), rtol=0, atol=1e-9)
    torch.testing.assert_close(g_root, root_bf, rtol=0, atol=1e-9)
    torch.testing.assert_close(g_lex, lexical_bf, rtol=0, atol=1e-9)
    _, spans = span_posteriors(r, terminal.detach(), lengths)
    n = len(words)
    for i in range(n):
        for width in range(2, n - i + 1):
            want = spans_bf.get((i, i + width), 0.0)
            assert math.isclose(float(spans[0, i, width]), want, abs_tol=1e-9), (i, width)


@pytest.mark.parametrize("nt_emit", [False, True])
@pytest.mark.parametrize("use_pot", [False, True])
def test_kernel_matches_the_dense_engine_on_the_implied_tensor(nt_emit, use_pot):
    # Second path: `engine.inside.log_partition` (itself checked against enumeration and
    # `engine.reference`) on the (NT, S, S) tensor the factors imply. Mixed lengths, words that
    # nonterminals also emit, and span potentials exercise every input of the kernel.
    gen = torch.Generator().manual_seed(3)
    nt, t, batch, n = 4, 5, 4, 7
    s = nt + t
    root = torch.randn(nt, generator=gen, dtype=F64).log_softmax(0)
    left = torch.randn(nt, s, generator=gen, dtype=F64).mul(2).log_softmax(1)
    right = torch.randn(nt, s, generator=gen, dtype=F64).mul(2).log_softmax(1)
    terminal = torch.randn(batch, n, t, generator=gen, dtype=F64) - 1
    nt_terminal = torch.randn(batch, n, nt, generator=gen, dtype=F64) - 2 if nt_emit else None
    span_pot = torch.randn(batch, n + 1, n + 1, generator=gen, dtype=F64) * 0.3 \
        if use_pot else None
    lengths = torch.tensor([7, 2, 5, 1])
    inputs = [x for x in (root, left, right, terminal, nt_terminal, span_pot) if x is not None]

    def run(dense: bool):
        leaves = [x.clone().requires_grad_() for x in inputs]
        named = dict(zip(["root", "left", "right", "terminal"], leaves))
        rest = leaves[4:]
        nt_t = rest.pop(0) if nt_emit else None
        pot = rest.pop(0) if use_pot else None
        if dense:
            binary = independent_dense_binary(named["left"], named["right"])
            z = log_partition(named["root"], binary, named["terminal"], lengths, nt_t, pot)
        else:
            z = independent_log_partition(named["root"], named["left"], named["right"],
                                          named["terminal"], lengths, nt_t, pot)
        ok = torch.isfinite(z)
        grads = torch.autograd.grad(torch.where(ok, z, torch.zeros_like(z)).sum(), leaves)
        return z.detach(), grads

    z_fast, g_fast = run(False)
    z_dense, g_dense = run(True)
    torch.testing.assert_close(z_fast, z_dense, rtol=0, atol=1e-9)
    assert bool(torch.isfinite(z_fast[:3]).all())          # real sentences, not -inf agreeing
    for a, b in zip(g_fast, g_dense):
        torch.testing.assert_close(a, b, rtol=0, atol=1e-9)


def test_gradients_asked_for_alone_match_the_full_pass():
    # The outside pass makes only the gradients asked for; each alone must equal its value in
    # the pass that asks for all (reference: the same kernel with every gradient requested).
    gen = torch.Generator().manual_seed(5)
    nt, t, batch, n = 3, 4, 2, 5
    s = nt + t
    base = [torch.randn(nt, generator=gen, dtype=F64).log_softmax(0),
            torch.randn(nt, s, generator=gen, dtype=F64).log_softmax(1),
            torch.randn(nt, s, generator=gen, dtype=F64).log_softmax(1),
            torch.randn(batch, n, t, generator=gen, dtype=F64),
            torch.randn(batch, n, nt, generator=gen, dtype=F64) - 1,
            torch.zeros(batch, n + 1, n + 1, dtype=F64)]
    lengths = torch.tensor([5, 3])

    def log_z(x):     # root, left, right, terminal, nt_terminal, span_pot
        return independent_log_partition(*x[:4], lengths, x[4], x[5])

    everything = [x.clone().requires_grad_() for x in base]
    full = torch.autograd.grad(log_z(everything).sum(), everything)
    for wanted in ([5], [3], [4], [1, 2], [0], [1, 5]):
        leaves = [x.clone().requires_grad_(i in wanted) for i, x in enumerate(base)]
        z = log_z(leaves)
        got = torch.autograd.grad(z.sum(), [leaves[i] for i in wanted])
        for i, g in zip(wanted, got):
            torch.testing.assert_close(g, full[i], rtol=0, atol=1e-12)


def test_float32_agrees_with_float64():
    # Scaled cells keep float32 in range (common practice: compare against float64).
    gen = torch.Generator().manual_seed(7)
    nt, t, batch, n = 8, 12, 3, 15
    s = nt + t
    args = [torch.randn(nt, generator=gen, dtype=F64).log_softmax(0),
            torch.randn(nt, s, generator=gen, dtype=F64).log_softmax(1),
            torch.randn(nt, s, generator=gen, dtype=F64).log_softmax(1),
            torch.randn(batch, n, t, generator=gen, dtype=F64) - 4]
    lengths = torch.tensor([15, 9, 2])
    z64 = independent_log_partition(*args, lengths)
    z32 = independent_log_partition(*(x.float() for x in args), lengths)
    assert bool(torch.isfinite(z64).all())
    torch.testing.assert_close(z32.double(), z64, rtol=1e-5, atol=0)


@pytest.mark.parametrize("per_symbol", [1, 3, 10, 49])
def test_most_probable_rules_match_a_plain_sort_of_every_rule(per_symbol):
    # Reference: every rule of each parent formed and ranked by Python's sorted(), the mass
    # left out summed in a plain loop.
    r = _rules(nt=3, t=4, seed=2)
    pruned, removed = r.most_probable(per_symbol)
    dense = r.binary.exp()
    nt, s, _ = dense.shape
    for a in range(nt):
        ranked = sorted(((float(dense[a, b, c]), b, c) for b in range(s) for c in range(s)),
                        reverse=True)
        top = ranked[:per_symbol]
        saved = {(b, c) for b in range(s) for c in range(s)
                 if math.isfinite(float(pruned.binary[a, b, c]))}
        assert saved == {(b, c) for _, b, c in top}
        for p, b, c in top:
            assert math.isclose(math.exp(float(pruned.binary[a, b, c])), p, rel_tol=1e-12)
        assert math.isclose(float(removed[a]), 1.0 - sum(p for p, _, _ in top), abs_tol=1e-12)


def _metric_rows(run) -> tuple[list[dict], list[float]]:
    """A run's metric lines, and the training log-likelihood per word of each epoch line."""
    rows = [json.loads(x) for x in (run / "metrics.jsonl").read_text().splitlines()]
    return rows, [r["train/loglik_per_word"] for r in rows
                  if "epoch" in r and "train/loglik_per_word" in r]


def _demo_corpus(folder, name: str, sentences: int, max_words: int):
    """The first `sentences` lines of a demo file with at most `max_words` words (trees: by
    their leaves)."""
    def words(line: str) -> int:          # a tree's words are its tokens that open nothing
        return sum(not token.startswith("(") for token in line.split())

    lines = [x for x in (demo_data_dir() / name).read_text().splitlines()
             if words(x) <= max_words][:sentences]
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / name
    path.write_text("\n".join(lines) + "\n")
    return path


def test_independent_trains_on_demo_text_and_likelihood_rises(tmp_path):
    train_path = _demo_corpus(tmp_path / "data", "train.txt", 120, 8)
    dev_path = _demo_corpus(tmp_path / "data", "dev.trees", 20, 8)
    cfg = load_train_config(None, base_overrides(
        tmp_path, train_path, dev_path, **{"train.method": "gradient",
                                       "model.parameterization": "independent",
                                       "model.nonterminals": 6, "model.preterminals": 10,
                                       "train.epochs": 3, "optimizer.lr": 0.1,
                                       "train.batch_size": 20}))
    trainer = train(cfg, tmp_path / "run")
    rows, epochs = _metric_rows(tmp_path / "run")
    assert len(epochs) >= 3, rows
    assert epochs[-1] > epochs[0] + 0.1, epochs       # gradient ascent on the log-likelihood
    dev = [r for r in rows if "dev/loglik_per_word" in r]
    assert dev and all(math.isfinite(r["dev/loglik_per_word"])
                       and 0.0 <= r["dev/sentence_f1"] <= 1.0 for r in dev), dev
    # The saved grammar file gives a sentence the likelihood the factored model did (the
    # dense engine over the file against the independent kernel over the factors).
    grammar = load_grammar(trainer.grammar_path_)
    rules = trainer.current_rules()
    assert isinstance(rules, IndependentRules)
    words = train_path.read_text().splitlines()[0].split()
    ids = torch.tensor([[trainer.data.vocab.index[w] for w in words]])
    lengths = torch.tensor([len(words)])
    with torch.no_grad():
        mine = rules.log_partition(encode_ids(rules.lexical, ids, lengths).terminal, lengths)
    file_score = score(grammar, [words], dtype=F64)[0].logprob
    assert math.isclose(file_score, float(mine[0]), rel_tol=1e-8)


def test_a_grammar_over_the_rule_cap_is_saved_with_each_symbols_most_probable_rules(tmp_path):
    # Reference: the model's own dense rules ranked by sorted() per nonterminal.
    train_path, _ = write_corpus(tmp_path / "data", train=40, dev=0)
    cfg = load_train_config(None, base_overrides(
        tmp_path, train_path, None, **{"train.method": "gradient",
                                       "model.parameterization": "independent",
                                       "train.epochs": 1, "output.max_saved_rules": 30}))
    trainer = train(cfg, tmp_path / "run")
    grammar = load_grammar(trainer.grammar_path_)
    dense = trainer.current_rules().binary.double().exp()          # (3, 8, 8)
    nt, s, _ = dense.shape
    log = (tmp_path / "run" / "train.log").read_text()
    assert "more than output.max_saved_rules (30); saved each nonterminal's 10 most" in log
    removed = []
    for a in range(nt):
        ranked = sorted(((float(dense[a, b, c]), b, c) for b in range(s) for c in range(s)),
                        reverse=True)[:10]
        saved = {(b, c) for b in range(s) for c in range(s)
                 if math.isfinite(float(grammar.binary[a, b, c]))}
        assert saved == {(b, c) for _, b, c in ranked}
        mass = sum(p for p, _, _ in ranked)
        removed.append(1.0 - mass)
        for p, b, c in ranked:                                  # renormalised over what is kept
            assert math.isclose(math.exp(float(grammar.binary[a, b, c])), p / mass,
                                rel_tol=1e-9)
    names = grammar.nonterminals
    worst = max(range(nt), key=lambda a: removed[a])
    assert f"at most {removed[worst]:.4g}, {names[worst]})" in log


def test_a_grammar_too_large_for_a_dense_tensor_is_written_from_its_kept_rules(tmp_path,
                                                                               monkeypatch):
    # Reference: the same run's grammar file written through the dense Grammar (the path of
    # the test above, checked against a plain sort of every rule): the same rules and
    # probabilities, and a file that loads and parses. The dense limit is lowered so that a
    # small grammar takes the path of one with 1,024 nonterminals.
    from treewright.train import config as config_module
    from treewright.train import finish as finish_module
    train_path, _ = write_corpus(tmp_path / "data", train=40, dev=0)
    overrides = {"train.method": "gradient", "model.parameterization": "independent",
                 "train.epochs": 1, "output.max_saved_rules": 30}
    dense_run = train(load_train_config(None, base_overrides(tmp_path, train_path, None,
                                                             **overrides)), tmp_path / "dense")
    monkeypatch.setattr(config_module, "INDEPENDENT_MAX_DENSE_RULES", 100)
    monkeypatch.setattr(finish_module, "INDEPENDENT_MAX_DENSE_RULES", 100)
    written = []
    real = finish_module._pairs_text
    monkeypatch.setattr(finish_module, "_pairs_text", lambda *a: written.append(1) or real(*a))
    sparse_run = train(load_train_config(None, base_overrides(tmp_path, train_path, None,
                                                              **overrides)), tmp_path / "sparse")
    assert written == [1]                  # 3 x 8 x 8 = 192 rules, over the lowered limit
    want, got = load_grammar(dense_run.grammar_path_), load_grammar(sparse_run.grammar_path_)
    assert got.symbols == want.symbols and got.vocab.words == want.vocab.words
    for mine, theirs in ((got.root, want.root), (got.binary, want.binary),
                         (got.lexical, want.lexical)):
        assert torch.equal(torch.isfinite(mine), torch.isfinite(theirs))
        torch.testing.assert_close(mine.exp(), theirs.exp(), rtol=1e-12, atol=1e-15)
    assert "saved each nonterminal's 10 most" in (tmp_path / "sparse" / "train.log").read_text()
    # Without a cap a file of every rule would need the dense tensor: refused before training.
    with pytest.raises(InputError, match="output.max_saved_rules"):
        load_train_config(None, base_overrides(tmp_path, train_path, None, **{
            **overrides, "output.max_saved_rules": None}))


@pytest.mark.parametrize("words", [[0, 1, 2], [3, 0, 2, 1]])
def test_the_neural_form_gives_normalized_factors_and_the_enumerated_log_z(words):
    # The neural form computes the same two factors from embeddings: each row a distribution,
    # and the model's log Z (through the independent kernel) that of every tree enumerated
    # under the rules the factors imply (test_train_fixtures.brute_force).
    model = NeuralIndependentParams(2, 3, 4, dim=8, blocks=1,
                                    generator=torch.Generator().manual_seed(5), dtype=F64)
    rules = model.rules()
    assert isinstance(rules, IndependentRules)
    for factor in (rules.root[None], rules.left, rules.right, rules.lexical):
        torch.testing.assert_close(factor.exp().sum(-1), torch.ones(len(factor), dtype=F64),
                                   rtol=0, atol=1e-12)
    logz_bf = brute_force(model.snapshot().dense(), words)[0]
    logz, _ = model.log_partition(torch.tensor([words]), torch.tensor([len(words)]))
    assert math.isclose(float(logz[0].detach()), logz_bf, rel_tol=1e-9)
    # Every parameter is reached by the gradient (the networks are wired into the factors).
    logz.sum().backward()
    assert all(p.grad is not None and p.grad.abs().sum() > 0 for p in model.parameters())


def test_the_neural_form_trains_on_demo_text_and_likelihood_rises(tmp_path):
    train_path = _demo_corpus(tmp_path / "data", "train.txt", 120, 8)
    cfg = load_train_config(None, base_overrides(
        tmp_path, train_path, None, **{"train.method": "gradient",
                                       "model.parameterization": "independent-neural",
                                       "model.nonterminals": 6, "model.preterminals": 10,
                                       "model.embedding_dim": 32, "train.epochs": 3,
                                       "optimizer.lr": 0.01, "train.batch_size": 20}))
    trainer = train(cfg, tmp_path / "run")
    rows, epochs = _metric_rows(tmp_path / "run")
    assert len(epochs) == 3 and epochs[-1] > epochs[0] + 0.1, epochs
    # The saved grammar file scores a sentence as the factored model does.
    grammar = load_grammar(trainer.grammar_path_)
    words = train_path.read_text().splitlines()[0].split()
    ids = torch.tensor([[trainer.data.vocab.index[w] for w in words]])
    with torch.no_grad():
        mine, _ = trainer.model.double().log_partition(ids, torch.tensor([len(words)]))
    assert math.isclose(score(grammar, [words], dtype=F64)[0].logprob, float(mine[0]),
                        rel_tol=1e-6)


def test_em_counts_and_m_step_match_enumeration():
    # Reference: brute-force enumeration of every tree of each sentence
    # (test_train_fixtures.brute_force) under the rules the factors imply. The E-step's factor
    # counts are the enumerated rule counts summed over the other child, and the M-step is
    # each factor's counts over their row total (the maximizer of the expected log-likelihood
    # of the factored rules, by the usual Lagrange argument).
    r = _rules(nt=2, t=3, v=4, seed=3)
    sentences = [[0, 1, 2], [3, 0, 2, 1], [2, 2]]
    batch = make_batch([0, 1, 2], sentences, None, F64)
    counts = independent_counts(r, batch)
    root = torch.zeros(2, dtype=F64)
    binary = torch.zeros(2, 5, 5, dtype=F64)
    lexical = torch.zeros(3, 4, dtype=F64)
    loglik = 0.0
    for words in sentences:
        logz, root_bf, binary_bf, lexical_bf, _ = brute_force(r.dense(), words)
        loglik += logz
        root, binary, lexical = root + root_bf, binary + binary_bf, lexical + lexical_bf
    assert math.isclose(counts.loglik, loglik, rel_tol=1e-10)
    assert (counts.words, counts.sentences, counts.unparsed) == (9, 3, 0)
    torch.testing.assert_close(counts.root, root, rtol=0, atol=1e-9)
    torch.testing.assert_close(counts.binary[:, 0], binary.sum(2), rtol=0, atol=1e-9)
    torch.testing.assert_close(counts.binary[:, 1], binary.sum(1), rtol=0, atol=1e-9)
    torch.testing.assert_close(counts.lexical, lexical, rtol=0, atol=1e-9)
    new = updates.maximum_likelihood(counts, r)
    assert isinstance(new, IndependentRules)
    torch.testing.assert_close(new.left.exp(), binary.sum(2) / binary.sum((1, 2))[:, None])
    torch.testing.assert_close(new.right.exp(), binary.sum(1) / binary.sum((1, 2))[:, None])
    torch.testing.assert_close(new.root.exp(), root / root.sum())
    torch.testing.assert_close(new.lexical.exp(), lexical / lexical.sum(1, keepdim=True))
    # MAP-EM with Dirichlet(2) on every factor row: add-one counts (the mode of the posterior).
    smooth = updates.dirichlet_map(counts, 2.0, r)
    left = binary.sum(2) + 1
    torch.testing.assert_close(smooth.left.exp(), left / left.sum(1, keepdim=True))


def test_em_on_independent_productions_never_lowers_the_likelihood(tmp_path):
    # Fact of the trade (common practice; Dempster, Laird & Rubin 1977): each EM iteration
    # leaves the training log-likelihood no lower. Factored rules are a PCFG with tied
    # parameters, for which the M-step above is exact, so the property must hold here too.
    train_path, _ = write_corpus(tmp_path / "data", train=60, dev=0)
    cfg = load_train_config(None, base_overrides(
        tmp_path, train_path, None, **{"train.method": "em",
                                       "model.parameterization": "independent",
                                       "train.epochs": 6, "train.tolerance": 0}))
    trainer = train(cfg, tmp_path / "run")
    rows, epochs = _metric_rows(tmp_path / "run")
    assert len(epochs) == 6, rows
    assert all(b >= a - 1e-9 * abs(a) for a, b in zip(epochs, epochs[1:])), epochs
    assert epochs[-1] > epochs[0] + 0.1, epochs
    assert isinstance(trainer.current_rules(), IndependentRules)


def test_independent_is_registered_and_refuses_the_methods_it_lacks():
    assert PARAMETERIZATIONS["independent"] is IndependentParams
    assert PARAMETERIZATIONS["independent-neural"] is NeuralIndependentParams
    base = ["data.train=x.txt", "model.parameterization=independent"]
    for method in ("em", "map_em"):
        load_train_config(None, base + [f"train.method={method}", "prior.concentration=2"
                                        if method == "map_em" else "train.epochs=2"])
    for method in ("online_em", "vb"):
        with pytest.raises(InputError, match="train.method.*dense\\s+rule tables"):
            load_train_config(None, base + [f"train.method={method}"])
    for method in ("em", "online_em", "map_em", "vb"):
        with pytest.raises(InputError, match="train.method.*only with 'gradient'"):
            load_train_config(None, ["data.train=x.txt", "model.parameterization="
                                     "independent-neural", f"train.method={method}"])


def test_a_grammar_too_large_to_write_is_refused_before_training():
    # 256 and 512 give 256 x 768^2 = 150,994,944 rules (under the bound 2^28 = 268,435,456);
    # 512 and 1,024 give 512 x 1,536^2 = 1,207,959,552 (over it): arithmetic by hand. Over it,
    # a file of each nonterminal's most probable rules is written (the default cap, 5 million,
    # or any cap up to the bound), but not one of every rule or of more than the bound.
    base = ["data.train=x.txt", "model.parameterization=independent", "train.method=gradient"]
    load_train_config(None, base + ["model.nonterminals=256", "model.preterminals=512",
                                    "output.max_saved_rules=null"])
    big = base + ["model.nonterminals=512", "model.preterminals=1024"]
    load_train_config(None, big)
    load_train_config(None, big + ["output.max_saved_rules=268435456"])
    for cap in ("null", "268435457"):
        with pytest.raises(InputError, match="1,207,959,552 binary rules"):
            load_train_config(None, big + [f"output.max_saved_rules={cap}"])


@pytest.mark.parametrize("parameterization", ["independent", "lowrank"])
def test_parse_on_a_factored_run_reads_the_model_not_the_grammar_file(
        tmp_path, monkeypatch, capsys, parameterization):
    # Reference: decode(..., "mbr") on the run's grammar file (the same rules as a dense
    # Grammar; its mbr is checked against enumeration in test_decode.py): the same trees; the
    # same for max-rule-product. The model path must not open the grammar file at all.
    from treewright.cli import main
    from treewright.decode import decode
    from treewright.export import source as source_module
    train_path = _demo_corpus(tmp_path / "data", "train.txt", 60, 8)
    extra = {"model.rank": 12, "optimizer.lr": 0.01} if parameterization == "lowrank" else {}
    cfg = load_train_config(None, base_overrides(
        tmp_path, train_path, None, **{"train.method": "gradient",
                                       "model.parameterization": parameterization,
                                       "model.nonterminals": 4, "model.preterminals": 6,
                                       "train.epochs": 2, "optimizer.lr": 0.1,
                                       "train.batch_size": 20, "train.dtype": "float64",
                                       **extra}))   # (lr 0.1 diverges the low-rank model)
    train(cfg, tmp_path / "run")
    lines = train_path.read_text().splitlines()[:12]
    lines[6] = "zzunknown " + lines[6]      # read as the unknown-word token, as training did
    text = tmp_path / "text.txt"
    text.write_text("\n".join(lines[:6] + [""] + lines[6:]) + "\n")
    expect = decode(load_grammar(tmp_path / "run" / "grammar.pcfg"),
                    [line.split() for line in lines], "mbr")
    expect_mrp = decode(load_grammar(tmp_path / "run" / "grammar.pcfg"),
                        [line.split() for line in lines], "max-rule-product")

    def refuse(path):
        raise AssertionError(f"the grammar file was loaded: {path}")

    monkeypatch.setattr(source_module, "load_grammar", refuse)
    capsys.readouterr()
    assert main(["parse", str(tmp_path / "run"), str(text), "--decoder", "mbr", "--scores"]) == 0
    rows = capsys.readouterr().out.split("\n")
    assert rows[6] == "" and len(rows) == 14 and rows[13] == ""   # the blank line stays blank
    printed = [r.split("\t") for r in rows[:6] + rows[7:13]]
    for fields, d in zip(printed, expect, strict=True):
        assert fields[0] == d.tree.to_string()
        assert float(fields[1]) == pytest.approx(d.tree_logprob, abs=1e-8)
        assert float(fields[2]) == pytest.approx(d.posterior, abs=1e-8)
    # max-rule-product goes through the model as well (decode(..., "max-rule-product") on the
    # grammar file, checked against enumeration in test_decode.py, as the reference).
    assert main(["parse", str(tmp_path / "run"), str(text), "--decoder", "max-rule-product",
                 "--scores", "--objective"]) == 0
    mrp = capsys.readouterr().out.split("\n")
    for fields, d in zip([r.split("\t") for r in mrp[:6] + mrp[7:13]], expect_mrp, strict=True):
        assert fields[0] == d.tree.to_string()
        assert float(fields[1]) == pytest.approx(d.tree_logprob, abs=1e-8)
        assert float(fields[3]) == pytest.approx(d.score, abs=1e-8)
    # Without --decoder, a run of factored rules is decoded with mbr, and says so.
    assert main(["parse", str(tmp_path / "run"), str(text), "--scores"]) == 0
    again = capsys.readouterr()
    assert again.out.split("\n") == rows and "mbr through the run's own model" in again.err
    # The model's own pass does not apply the word-piece constraint: asking for it is refused.
    assert main(["parse", str(tmp_path / "run"), str(text), "--word-pieces", "host-first"]) != 0
    assert "the mbr decoder reads the model itself" in capsys.readouterr().err
    # score: the same log-likelihoods as the grammar file gives (inference.score, the dense
    # engine over the file), with the unknown word read as the unknown-word token and listed.
    assert main(["score", str(tmp_path / "run"), str(text), "--float64"]) == 0
    scored = [json.loads(r) for r in capsys.readouterr().out.splitlines()]
    assert [r["line"] for r in scored[:-1]] == [k for k in range(1, 14) if k != 7]
    for r, d in zip(scored[:-1], expect, strict=True):
        assert r["logprob"] == pytest.approx(d.log_likelihood, abs=1e-8)
    assert scored[6]["unknown"] == ["zzunknown"] and scored[-1]["summary"]["parsed"] == 12
    # evaluate --grammar RUN --text: the held-out likelihood is the same sum over the parsed
    # sentences (12 of them, all), from the model.
    pred, held_out = tmp_path / "pred.trees", tmp_path / "held_out.txt"
    pred.write_text("".join(f"{d.tree.to_string()}\n" for d in expect))
    held_out.write_text("\n".join(lines) + "\n")
    assert main(["evaluate", str(pred), str(pred), "--grammar", str(tmp_path / "run"),
                 "--text", str(held_out), "--json", "-"]) == 0
    held = json.loads(capsys.readouterr().out)["likelihood"]
    words = sum(len(line.split()) for line in lines)
    assert held["total_words"] == words and held["sentences"] == 12
    assert held["logprob_per_word"] == pytest.approx(
        sum(d.log_likelihood for d in expect) / words, rel=1e-6)
    # The model's vocabulary is the training corpus read again: gone, it is named, and the
    # grammar file is offered instead (which this test's monkeypatch would refuse to load).
    train_path.rename(tmp_path / "moved.txt")
    assert main(["parse", str(tmp_path / "run"), str(text), "--decoder", "mbr"]) != 0
    err = capsys.readouterr().err
    assert str(train_path) in err and "grammar.pcfg instead of the folder" in err


def test_rule_entropies_of_independent_productions_match_their_dense_rules():
    # Reference: the entropies computed on the (NT, S, S) tensor the factors imply (the path
    # for dense rules); independent productions give the sum of their two factors' entropies.
    from treewright.train.metrics import rule_entropies
    r = _rules(nt=3, t=4, v=5, seed=2)
    names = (["N0", "N1", "N2"], ["T0", "T1", "T2", "T3"])
    mine, dense = rule_entropies(r, *names), rule_entropies(r.dense(), *names)
    assert mine.keys() == dense.keys()
    for key in mine:
        assert mine[key] == pytest.approx(dense[key], rel=1e-12, abs=1e-12), key
