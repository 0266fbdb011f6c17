"""The fast inside engine (and its hand-written outside) against independent references.

References: `engine.reference.reference_inside` (plain log-space inside pass, gradients by
autograd), brute-force counts of binary trees (Catalan numbers), and the benchmark script's own
smoke run.
"""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys

import pytest
import torch

from treewright.engine.inside import inside_chart, log_partition
from treewright.engine.lowrank import dense_binary, lowrank_log_partition
from treewright.engine.reference import reference_inside


def random_problem(nt, t, batch, n, nt_emit, seed, dtype=torch.float64):
    gen = torch.Generator().manual_seed(seed)
    s = nt + t
    root = torch.randn(nt, generator=gen, dtype=dtype).log_softmax(0)
    binary = torch.randn(nt, s * s, generator=gen, dtype=dtype).log_softmax(-1).view(nt, s, s)
    terminal = torch.randn(batch, n, t, generator=gen, dtype=dtype) * 2 - 1
    nt_terminal = torch.randn(batch, n, nt, generator=gen, dtype=dtype) - 2 if nt_emit else None
    lengths = torch.randint(1 if nt_emit else 2, n + 1, (batch,), generator=gen)
    lengths[0] = n
    span_pot = torch.randn(batch, n + 1, n + 1, generator=gen, dtype=dtype) * 0.3
    return root, binary, terminal, lengths, nt_terminal, span_pot


def value_and_grads(fn, root, binary, terminal, lengths, nt_terminal, span_pot):
    leaves = [x.clone().requires_grad_() if x is not None else None
              for x in (root, binary, terminal, nt_terminal, span_pot)]
    logz = fn(leaves[0], leaves[1], leaves[2], lengths, leaves[3], leaves[4])
    # A weighted sum, so that every sentence's gradient is checked with its own factor.
    (logz * torch.arange(1, len(logz) + 1, dtype=logz.dtype)).sum().backward()
    return logz.detach(), [x.grad for x in leaves if x is not None]


# NT = 3 and 9 exercise the zero padding of the nonterminal axis (to 8 and 16), NT = 8 none.
@pytest.mark.parametrize("nt,t", [(3, 4), (8, 3), (9, 5)])
@pytest.mark.parametrize("nt_emit", [False, True])
@pytest.mark.parametrize("use_pot", [False, True])
def test_matches_reference_values_and_all_gradients(nt, t, nt_emit, use_pot):
    # Reference: reference_inside, the plain per-width log-space pass with autograd gradients.
    root, binary, terminal, lengths, nt_terminal, span_pot = random_problem(
        nt, t, batch=4, n=7, nt_emit=nt_emit, seed=nt * 10 + t)
    if not use_pot:
        span_pot = None
    z, grads = value_and_grads(log_partition, root, binary, terminal, lengths, nt_terminal,
                               span_pot)
    z_ref, grads_ref = value_and_grads(reference_inside, root, binary, terminal, lengths,
                                       nt_terminal, span_pot)
    torch.testing.assert_close(z, z_ref, rtol=1e-10, atol=1e-10)
    assert len(grads) == len(grads_ref)
    for g, g_ref in zip(grads, grads_ref):
        torch.testing.assert_close(g, g_ref, rtol=1e-9, atol=1e-10)


def _grads_of(fn, inputs: dict, lengths, wanted) -> dict:
    """The gradients of a weighted sum of log Z for the inputs named in `wanted` only (the
    others do not require grad, so the outside pass may skip their work)."""
    leaves = {k: (x.clone().requires_grad_() if k in wanted else x) for k, x in inputs.items()}
    logz = fn(leaves["root"], leaves["binary"], leaves["terminal"], lengths,
              leaves["nt_terminal"], leaves["span_pot"])
    (logz * torch.arange(1, len(logz) + 1, dtype=logz.dtype)).sum().backward()
    return {k: leaves[k].grad for k in wanted}


@pytest.mark.parametrize("wanted", [("span_pot",), ("terminal",), ("binary",),
                                    ("binary", "span_pot"), ("root", "nt_terminal")])
@pytest.mark.parametrize("per_sentence", [False, True])
def test_gradients_asked_for_alone_match_the_full_pass(wanted, per_sentence):
    # Reference: reference_inside with autograd for shared rules; for rules per sentence, which
    # the reference does not take, the full pass (itself checked against the reference,
    # sentence by sentence, above).
    root, binary, terminal, lengths, nt_terminal, span_pot = random_problem(
        5, 4, batch=3, n=6, nt_emit=True, seed=31)
    if per_sentence:
        gen = torch.Generator().manual_seed(32)
        binary = torch.randn(3, 5, 81, generator=gen, dtype=torch.float64).log_softmax(-1)
        binary = binary.view(3, 5, 9, 9)
    inputs = {"root": root, "binary": binary, "terminal": terminal, "nt_terminal": nt_terminal,
              "span_pot": span_pot}
    mine = _grads_of(log_partition, inputs, lengths, wanted)
    every = tuple(inputs)
    ref = _grads_of(log_partition if per_sentence else reference_inside, inputs, lengths,
                    every)
    for k in wanted:
        torch.testing.assert_close(mine[k], ref[k], rtol=1e-9, atol=1e-10)


def test_per_sentence_root_distribution_matches_reference():
    # Reference: reference_inside with a (B, NT) root, the other accepted root shape.
    root, binary, terminal, lengths, _, _ = random_problem(4, 3, 3, 5, False, seed=7)
    root_b = torch.randn(3, 4, dtype=torch.float64).log_softmax(-1)
    z, grads = value_and_grads(log_partition, root_b, binary, terminal, lengths, None, None)
    z_ref, grads_ref = value_and_grads(reference_inside, root_b, binary, terminal, lengths,
                                       None, None)
    torch.testing.assert_close(z, z_ref)
    for g, g_ref in zip(grads, grads_ref):
        torch.testing.assert_close(g, g_ref)


@pytest.mark.parametrize("nt,t", [(3, 4), (9, 5)])
@pytest.mark.parametrize("nt_emit", [False, True])
def test_rules_per_sentence_match_reference_sentence_by_sentence(nt, t, nt_emit):
    # Reference: reference_inside run on each sentence alone, with that sentence's own rules,
    # over its own length (so padding of the shorter sentences is checked too).
    root, _, terminal, lengths, nt_terminal, span_pot = random_problem(
        nt, t, batch=4, n=7, nt_emit=nt_emit, seed=nt * 10 + t + 1)
    gen = torch.Generator().manual_seed(nt + t)
    s = nt + t
    binary = torch.randn(4, nt, s * s, generator=gen, dtype=torch.float64).log_softmax(-1)
    binary = binary.view(4, nt, s, s)
    root_b = root.expand(4, -1).contiguous()
    z, grads = value_and_grads(log_partition, root_b, binary, terminal, lengths, nt_terminal,
                               span_pot)
    for b in range(4):
        n = int(lengths[b])
        one = (root_b[b], binary[b], terminal[b:b + 1, :n], lengths[b:b + 1],
               None if nt_terminal is None else nt_terminal[b:b + 1, :n],
               span_pot[b:b + 1, :n + 1, :n + 1])
        z_ref, grads_ref = value_and_grads(reference_inside, *one)
        torch.testing.assert_close(z[b:b + 1], z_ref, rtol=1e-10, atol=1e-10)
        # value_and_grads weights sentence b by b + 1; the lone reference sentence by 1.
        mine = [grads[0][b], grads[1][b], grads[2][b, :n]]
        if nt_terminal is not None:
            mine.append(grads[3][b, :n])
        mine.append(grads[-1][b, :n + 1, :n + 1])
        for g, g_ref in zip(mine, grads_ref):
            if g_ref is None:  # the reference leaves unused inputs (a one-word span) ungraded
                g_ref = torch.zeros_like(g)
            torch.testing.assert_close(g / (b + 1), g_ref.squeeze(0), rtol=1e-9, atol=1e-10)
        # Padding past a sentence's length gets no gradient.
        assert not grads[2][b, n:].any()


def test_viterbi_and_sampling_refuse_rules_per_sentence():
    from treewright.engine import sample_trees, viterbi
    root, binary, terminal, lengths, _, _ = random_problem(3, 4, 2, 4, False, seed=3)
    per_sentence = binary.expand(2, -1, -1, -1)
    for fn in (viterbi, sample_trees):
        with pytest.raises(ValueError, match="per sentence"):
            fn(root, per_sentence, terminal, lengths)


@pytest.mark.parametrize("n", [2, 3, 5, 8])
def test_counts_binary_trees_when_every_score_is_one(n):
    # Brute force / fact of combinatorics (common practice): with one symbol of each kind and all
    # scores 1, Z counts the binary bracketings of n words, the Catalan number C(n-1).
    binary = torch.zeros(1, 2, 2, dtype=torch.float64)
    terminal = torch.zeros(1, n, 1, dtype=torch.float64)
    z = log_partition(torch.zeros(1, dtype=torch.float64), binary, terminal, torch.tensor([n]))
    catalan = math.comb(2 * (n - 1), n - 1) // n
    assert math.isclose(float(z.exp()), catalan, rel_tol=1e-12)


@pytest.mark.parametrize("nt_emit", [False, True])
def test_chart_cells_match_reference_on_substrings(nt_emit):
    # Reference: reference_inside over the substring with root scores 0 (log 1) gives
    # log sum_A inside(A) of that span.
    root, binary, terminal, lengths, nt_terminal, _ = random_problem(
        3, 4, batch=2, n=6, nt_emit=nt_emit, seed=3)
    chart = inside_chart(binary, terminal, nt_terminal)
    assert chart.min_width == (1 if nt_emit else 2)
    for b in range(2):
        for start, width in [(0, 6), (1, 3), (2, 2), (4, 2)]:
            sub = slice(start, start + width)
            expected = reference_inside(
                torch.zeros(3, dtype=torch.float64), binary, terminal[b:b + 1, sub],
                torch.tensor([width]),
                None if nt_terminal is None else nt_terminal[b:b + 1, sub])
            got = torch.logsumexp(chart.log_inside(start, width, b), 0)
            torch.testing.assert_close(got, expected[0])
        torch.testing.assert_close(chart.log_term(5, b), terminal[b, 5])


def test_forbidden_root_span_gives_minus_infinity_and_zero_gradients():
    # Fact of the trade (common practice): a sentence whose whole span is forbidden has no parse;
    # the contract says -inf and zero gradients, never NaN. The other sentence must match
    # reference_inside.
    root, binary, terminal, _, _, _ = random_problem(3, 4, batch=2, n=5, nt_emit=False, seed=5)
    lengths = torch.tensor([5, 4])
    span_pot = torch.zeros(2, 6, 6, dtype=torch.float64)
    span_pot[0, 0, 5] = float("-inf")
    span_pot[1, 1, 2] = float("-inf")  # a forbidden inner span keeps sentence 1 parseable
    leaves = [x.clone().requires_grad_() for x in (root, binary, terminal, span_pot)]
    z = log_partition(leaves[0], leaves[1], leaves[2], lengths, span_pot=leaves[3])
    z.sum().backward()
    assert z[0] == float("-inf")
    for leaf in leaves:
        assert torch.isfinite(leaf.grad).all()
    assert (leaves[2].grad[0] == 0).all()
    ref = reference_inside(root, binary, terminal, lengths, span_pot=span_pot)
    torch.testing.assert_close(z[1].detach(), ref[1])


def test_float32_agrees_with_float64():
    # Reference: the float64 run of reference_inside. Tolerances from the targets
    # (1e-5 relative on log Z, 1e-4 on expected counts).
    root, binary, terminal, lengths, _, _ = random_problem(10, 20, 4, 12, False, seed=11)
    z64, (_, c64, _) = value_and_grads(reference_inside, root, binary, terminal, lengths,
                                       None, None)
    z32, (_, c32, _) = value_and_grads(log_partition, root.float(), binary.float(),
                                       terminal.float(), lengths, None, None)
    assert ((z32.double() - z64).abs() / z64.abs()).max() < 1e-5
    assert ((c32.double() - c64).abs() / c64.abs().clamp(min=1.0)).max() < 1e-4


@pytest.mark.slow
def test_benchmark_quick_run_writes_its_json(tmp_path):
    # Smoke run of the benchmark; checks the JSON holds every section with sane values.
    script = os.path.join(os.path.dirname(__file__), "..", "scripts", "bench_inside.py")
    out = tmp_path / "bench.json"
    subprocess.run([sys.executable, script, "--quick", "--json", str(out)], check=True,
                   capture_output=True)
    result = json.loads(out.read_text())
    assert result["matmul_gflops"] > 0
    assert all(row["fwd_s"] > 0 and row["fb_s"] > 0 for row in result["dense"])
    assert result["precision"]["logz_rel_err"] < 1e-5
    assert len(result["scaling"]["fwd_s"]) == len(result["scaling"]["n"])


def random_lowrank(nt, t, rank, seed, dtype=torch.float64):
    gen = torch.Generator().manual_seed(seed)
    s = nt + t
    u = torch.randn(nt, rank, generator=gen, dtype=dtype).log_softmax(1)
    v = torch.randn(s, rank, generator=gen, dtype=dtype).log_softmax(0)
    w = torch.randn(s, rank, generator=gen, dtype=dtype).log_softmax(0)
    return u, v, w


def test_lowrank_rules_are_normalised():
    # Yang, Zhao & Tu 2021: row-normalised U and column-normalised V, W give sum_{B,C} p = 1.
    u, v, w = random_lowrank(4, 5, 6, seed=1)
    totals = dense_binary(u, v, w).exp().sum((1, 2))
    torch.testing.assert_close(totals, torch.ones(4, dtype=torch.float64))


@pytest.mark.parametrize("nt_emit", [False, True])
@pytest.mark.parametrize("use_pot", [False, True])
def test_lowrank_matches_reference_on_the_implied_dense_rules(nt_emit, use_pot):
    # Reference: reference_inside on dense_binary(u, v, w), gradients by autograd through both.
    root, _, terminal, lengths, nt_terminal, span_pot = random_problem(
        3, 4, batch=3, n=6, nt_emit=nt_emit, seed=21)
    u, v, w = random_lowrank(3, 4, 5, seed=22)
    if not use_pot:
        span_pot = None
    leaves = [x.clone().requires_grad_() if x is not None else None
              for x in (root, u, v, w, terminal, nt_terminal, span_pot)]
    refs = [x.clone().requires_grad_() if x is not None else None
            for x in (root, u, v, w, terminal, nt_terminal, span_pot)]
    z = lowrank_log_partition(leaves[0], leaves[1], leaves[2], leaves[3], leaves[4], lengths,
                              leaves[5], leaves[6])
    z_ref = reference_inside(refs[0], dense_binary(refs[1], refs[2], refs[3]), refs[4],
                             lengths, refs[5], refs[6])
    factor = torch.arange(1, 4, dtype=torch.float64)
    (z * factor).sum().backward()
    (z_ref * factor).sum().backward()
    torch.testing.assert_close(z.detach(), z_ref.detach(), rtol=1e-10, atol=1e-10)
    for leaf, ref in zip(leaves, refs):
        if leaf is not None:
            torch.testing.assert_close(leaf.grad, ref.grad, rtol=1e-9, atol=1e-10)


@pytest.mark.parametrize("wanted", [("span_pot",), ("terminal",), ("v",), ("u", "v", "w"),
                                    ("root", "nt_terminal")])
def test_lowrank_gradients_asked_for_alone_match_the_reference(wanted):
    # Reference: reference_inside on dense_binary(u, v, w), every gradient by autograd.
    root, _, terminal, lengths, nt_terminal, span_pot = random_problem(
        3, 4, batch=3, n=6, nt_emit=True, seed=23)
    u, v, w = random_lowrank(3, 4, 5, seed=24)
    inputs = {"root": root, "u": u, "v": v, "w": w, "terminal": terminal,
              "nt_terminal": nt_terminal, "span_pot": span_pot}
    mine = {k: (x.clone().requires_grad_() if k in wanted else x) for k, x in inputs.items()}
    refs = {k: x.clone().requires_grad_() for k, x in inputs.items()}
    z = lowrank_log_partition(mine["root"], mine["u"], mine["v"], mine["w"], mine["terminal"],
                              lengths, mine["nt_terminal"], mine["span_pot"])
    z_ref = reference_inside(refs["root"], dense_binary(refs["u"], refs["v"], refs["w"]),
                             refs["terminal"], lengths, refs["nt_terminal"], refs["span_pot"])
    factor = torch.arange(1, 4, dtype=torch.float64)
    (z * factor).sum().backward()
    (z_ref * factor).sum().backward()
    for k in wanted:
        torch.testing.assert_close(mine[k].grad, refs[k].grad, rtol=1e-9, atol=1e-10)


def test_lowrank_forbidden_root_span_gives_minus_infinity_and_zero_gradients():
    # Fact of the trade (common practice): no parse -> -inf, finite zero gradients.
    root, _, terminal, _, _, _ = random_problem(3, 4, batch=2, n=4, nt_emit=False, seed=8)
    u, v, w = (x.requires_grad_() for x in random_lowrank(3, 4, 5, seed=9))
    span_pot = torch.zeros(2, 5, 5, dtype=torch.float64)
    span_pot[0, 0, 4] = float("-inf")
    z = lowrank_log_partition(root, u, v, w, terminal, torch.tensor([4, 4]), span_pot=span_pot)
    z[0].backward()
    assert z[0] == float("-inf") and torch.isfinite(z[1])
    for x in (u, v, w):
        assert (x.grad == 0).all()


@pytest.mark.parametrize("nt_emit", [False, True])
@pytest.mark.parametrize("factored", ["lowrank", "independent"])
def test_lowrank_label_marginals_match_the_dense_span_tables(nt_emit, factored):
    # References: engine.span_tables on the implied dense rules (its marginals are checked
    # against enumeration in test_decode.py), and reference_inside's gradient with respect to
    # a span potential (each span's marginal, summed over its nonterminals).
    from treewright.engine import span_tables
    from treewright.engine.lowrank import lowrank_label_marginals
    root, _, terminal, lengths, nt_terminal, _ = random_problem(
        3, 4, batch=3, n=6, nt_emit=nt_emit, seed=31)
    u, v, w = random_lowrank(3, 4, 5 if factored == "lowrank" else 3, seed=32)
    if factored == "independent":   # p(B | A, left) p(C | A, right): U the identity
        u = None
        v, w = v.log_softmax(0), w.log_softmax(0)
        dense = v.t()[:, :, None] + w.t()[:, None, :]
    else:
        dense = dense_binary(u, v, w)
    logz, marginals = lowrank_label_marginals(root, u, v, w, terminal, lengths, nt_terminal)
    expect = span_tables(root, dense, terminal, lengths, nt_terminal, log_scores=False)
    torch.testing.assert_close(logz, expect.logz, rtol=1e-10, atol=1e-10)
    torch.testing.assert_close(marginals, expect.marginals, rtol=1e-9, atol=1e-12)
    pot = torch.zeros(3, 7, 7, dtype=torch.float64, requires_grad=True)
    reference_inside(root, dense, terminal, lengths, nt_terminal, pot).sum().backward()
    spans = marginals[..., :3].sum(-1)
    torch.testing.assert_close(spans[:, :, 2:], pot.grad[:, :, 2:], rtol=1e-9, atol=1e-12)
