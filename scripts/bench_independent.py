"""Benchmark of the independent-productions inside pass (Liu, Yang, Kim & Tu 2023) against its
own matrix-product floor, measured in one process.

    .venv/bin/python scripts/bench_independent.py --threads 1           # NT 1,024, T 2,048
    .venv/bin/python scripts/bench_independent.py --quick               # smoke run, tiny sizes
    .venv/bin/python scripts/bench_independent.py --nt 512 --t 1024 --json out.json

The floor is counted as `scripts/bench_inside.py` counts the low-rank pass's: the flops of the
matrix products the engine cannot avoid, divided by this process's float32 1024 x 1024 matmul
rate (the best of two measurements, before and after the engine timing). Forward: each word
projected onto the parents by both factors (2 x 2 T NT), each span of width >= 2 projected by
both (2 x 2 NT NT); the backward does two products of the same size for each of these. The
split sums (elementwise) are left out, so the floor is a lower bound on the time, and the
printed ratio (time / floor) is at least 1. Forward+backward asks for the rule and the word
gradients, as a training step does. Every timing is the minimum of its repeats (the machine is
shared). Peak memory is VmHWM of a subprocess running one forward+backward, less that of a
subprocess that only imports torch.

    .venv/bin/python scripts/bench_independent.py --threads 1 --epoch            # 10,000 sentences
    .venv/bin/python scripts/bench_independent.py --threads 1 --epoch --sentences 1000

`--epoch` instead times one gradient-training epoch of `params.IndependentParams` as training
runs it: sentences of random word ids (V = 5,000; the pass costs the same whatever the words)
with lengths drawn uniformly from 1 to 30, seeded; length-bucketed batches of up to 32
(`corpus.length_batches`, `train.estep.make_batch`); per batch the rules, log Z, the loss per
word over the parsed sentences, the backward, clipping at norm 3 and an Adam step (the gradient
method's defaults). Peak memory is this process's VmHWM (no subprocess: the epoch is the whole
run). The process's CPU time is printed beside the wall time: at one thread on a quiet machine
the two agree, and on a shared one the CPU time is what the epoch itself cost. With
`--sentences N` below the target's 10,000 the epoch time is also extrapolated
linearly to 10,000 sentences of the same length distribution, and printed as an extrapolation.

`--epoch --parse` then decodes the same sentences with the trained model, as `parse --decoder
mbr` and `--decoder max-rule-product` decode a factored run (`decode.decode_factored`, batches
of 16, float32), and prints each one's rate against the epoch's.

    .venv/bin/python scripts/bench_independent.py --threads 1 --epoch --parse \
        --run RUN --text FILE --sentences 500

`--run` decodes with a finished training run's model instead (a run folder of independent
productions, `induce.load_factored`), on the first `--sentences` lines of FILE of at most
`--max-length` words, against an epoch of a fresh model of the run's sizes on the same
sentences: one epoch of random words leaves posteriors flatter than a trained model's, which
costs max-rule-product more (its bounds settle less; see `engine.maxplus.max_plus`).
"""

from __future__ import annotations

import argparse
import datetime
import json
import random
import sys
import time
from pathlib import Path

import torch

from treewright.allocator import tune_allocator
from treewright.corpus import length_batches
from treewright.engine.independent import independent_log_partition
from treewright.params import IndependentParams
from treewright.tracking import terminal_progress
from treewright.train.estep import make_batch

SCRIPTS = Path(__file__).resolve().parent
if str(SCRIPTS) not in sys.path:
    sys.path.insert(0, str(SCRIPTS))  # the sibling scripts, when this one is loaded by path
from bench_inside import best_time, matmul_gflops, run_probe  # noqa: E402  (shared)


def progress(message: str) -> None:
    print(message, file=sys.stderr, flush=True)


def independent_work(nt: int, t: int, n: int) -> float:
    """Matrix-product flops of one sentence's forward+backward (see the module docstring)."""
    spans = n * (n - 1) // 2
    forward = n * 4 * t * nt + spans * 4 * nt * nt
    return 3.0 * forward


def random_problem(nt: int, t: int, n: int, batch: int, seed: int = 0):
    """Random factors and word scores, the factors and words needing gradients as in training."""
    gen = torch.Generator().manual_seed(seed)
    s = nt + t
    root = torch.randn(nt, generator=gen).log_softmax(0)
    left = torch.randn(nt, s, generator=gen).log_softmax(1).requires_grad_()
    right = torch.randn(nt, s, generator=gen).log_softmax(1).requires_grad_()
    terminal = (torch.randn(batch, n, t, generator=gen) - 3.0).requires_grad_()
    return root, left, right, terminal, torch.full((batch,), n, dtype=torch.long)


def forward_backward(problem) -> float:
    root, left, right, terminal, lengths = problem
    logz = independent_log_partition(root, left, right, terminal, lengths)
    logz.sum().backward()
    left.grad = right.grad = terminal.grad = None
    return float(logz.detach().mean())


def vm_hwm_mib() -> float:
    with open("/proc/self/status") as status:
        return next(int(line.split()[1]) for line in status if line.startswith("VmHWM")) / 1024


TARGET_SENTENCES = 10_000  # the epoch: 10,000 sentences of up to 30 words


def train_epoch(model, corpus: list[list[int]], batch_size: int) -> dict:
    """One gradient-training epoch of `model` over `corpus` (word ids), timed as the module
    docstring says; its figures."""
    groups = length_batches([len(s) for s in corpus], batch_size)
    batches = [make_batch(g, corpus, None, torch.float32) for g in groups]
    optimizer = torch.optim.Adam(model.parameters(), lr=0.01, betas=(0.75, 0.999))
    progress(f"epoch: {len(corpus)} sentences in {len(batches)} batches")
    start, start_cpu = time.perf_counter(), time.process_time()
    loglik, words = 0.0, 0
    with terminal_progress(len(corpus), "epoch") as bar:
        for batch in batches:
            logz, _ = model.log_partition(batch.ids, batch.lengths, batch.span_pot)   # (B,)
            parsed = torch.isfinite(logz)  # one word under preterminal-only emission: no parse
            n_words = int(batch.lengths[parsed].sum())
            loss = -logz[parsed].sum() / max(n_words, 1)
            optimizer.zero_grad()
            loss.backward()
            torch.nn.utils.clip_grad_norm_(model.parameters(), 3.0)
            optimizer.step()
            loglik += float(logz[parsed].sum().detach())
            words += n_words
            bar.update(len(batch.lengths))
    seconds = time.perf_counter() - start
    return {"sentences": len(corpus), "words": sum(map(len, corpus)), "batches": len(batches),
            "epoch_s": seconds, "epoch_cpu_s": time.process_time() - start_cpu,
            "sent_per_s": len(corpus) / seconds, "loglik_per_word": loglik / max(words, 1),
            "extrapolated_epoch_s": None if len(corpus) >= TARGET_SENTENCES
            else seconds * TARGET_SENTENCES / len(corpus)}


def epoch(nt: int, t: int, sentences: int, max_length: int, vocab: int, batch_size: int,
          parse: bool = False) -> dict:
    """One gradient-training epoch on random sentences, timed as the module docstring says; its
    figures. With `parse`, then the same sentences decoded by the trained model
    (`decode.decode_factored`)."""
    from treewright.params.tabular import symbol_names
    from treewright.vocab import Vocabulary
    rng = random.Random(0)
    corpus = [[rng.randrange(vocab) for _ in range(rng.randint(1, max_length))]
              for _ in range(sentences)]
    model = IndependentParams(nt, t, vocab, generator=torch.Generator().manual_seed(0))
    progress(f"NT={nt} T={t} V={vocab}")
    figures = train_epoch(model, corpus, batch_size)
    if parse:
        names = Vocabulary([f"w{i}" for i in range(vocab)], unk=None)
        with torch.no_grad():
            rules = model.rules()
        figures.update(decode_after(rules, names, *symbol_names(nt, t),
                                    [[f"w{i}" for i in s] for s in corpus], figures["epoch_s"]))
    return {**figures, "max_length": max_length, "vocab": vocab, "peak_mib": vm_hwm_mib()}


def trained_run(run_dir: str, text: str, sentences: int, max_length: int,
                batch_size: int) -> dict:
    """`--run`: the first `sentences` lines of `text` of at most `max_length` words that the
    run's vocabulary reads (its own or its unknown word's id), decoded by the run's trained
    model (`induce.load_factored`) with mbr and max-rule-product, against a training epoch of
    a model of the same sizes on the same sentences (a pass costs the same whatever the rules'
    values); the figures of both."""
    from treewright.induce import load_factored
    run = load_factored(run_dir)
    if run is None:
        raise SystemExit(f"{run_dir}: not a finished run of factored rules that kept its last "
                         "restart")
    text_sentences = []
    with open(text, encoding="utf-8") as lines:
        for line in lines:
            words = line.split()
            if 1 <= len(words) <= max_length and min(run.vocab.encode(words)) >= 0:
                text_sentences.append(words)
                if len(text_sentences) == sentences:
                    break
    corpus = [run.vocab.encode(s) for s in text_sentences]
    nt, t = len(run.nonterminals), len(run.preterminals)
    model = IndependentParams(nt, t, len(run.vocab), generator=torch.Generator().manual_seed(0))
    progress(f"{run_dir}: NT={nt} T={t} V={len(run.vocab)}")
    figures = train_epoch(model, corpus, batch_size)
    figures.update(decode_after(run.rules, run.vocab, run.nonterminals, run.preterminals,
                                text_sentences, figures["epoch_s"]))
    return {**figures, "nt": nt, "t": t, "run": str(run_dir), "text": str(text),
            "max_length": max_length,
            "vocab": len(run.vocab), "peak_mib": vm_hwm_mib()}


PARSE_BATCH = 16  # `treewright parse`'s batch size


def decode_after(rules, vocab, nonterminals: list[str], preterminals: list[str],
                 text: list[list[str]], epoch_s: float) -> dict:
    """`parse` with MBR, then with max-rule-product, on trained `rules`
    (`decode.decode_factored`, batches of `PARSE_BATCH` in the rules' dtype), each timed as
    the epoch is, and its rate against the epoch's (issue 24: at least 0.5). Keys `parse_*`
    for mbr, `mrp_*` for max-rule-product."""
    from treewright.decode import decode_factored

    figures = {}
    for decoder, key in (("mbr", "parse"), ("max-rule-product", "mrp")):
        progress(f"parse: the same {len(text)} sentences, {decoder}, batches of {PARSE_BATCH}")
        start, start_cpu = time.perf_counter(), time.process_time()
        decoded = decode_factored(rules, vocab, nonterminals, preterminals, text,
                                  PARSE_BATCH, decoder)
        seconds = time.perf_counter() - start
        figures.update({f"{key}_s": seconds, f"{key}_cpu_s": time.process_time() - start_cpu,
                        f"{key}_sent_per_s": len(text) / seconds,
                        f"{key}_ratio": epoch_s / seconds,
                        f"{key}_parsed": sum(d.tree is not None for d in decoded)})
    figures["parsed"] = figures.pop("parse_parsed")
    return figures


def print_epoch(r: dict) -> None:
    print(f"independent productions, training epoch, {r['date']}, torch {r['torch']}, "
          f"{r['threads']} threads")
    if "run" in r:
        print(f"decoding with the trained model of {r['run']}, on {r['text']}; the epoch trains "
              "a fresh model of the same sizes on the same sentences")
    print(f"NT={r['nt']} T={r['t']} V={r['vocab']}: {r['sentences']} sentences of 1-"
          f"{r['max_length']} words ({r['words']} words) in {r['batches']} batches of <= "
          f"{r['batch']}: {r['epoch_s']:.1f} s ({r['sent_per_s']:.1f} sent/s; CPU time "
          f"{r['epoch_cpu_s']:.1f} s), log-likelihood "
          f"{r['loglik_per_word']:.3f} per word; peak memory {r['peak_mib']:.0f} MiB")
    if r["extrapolated_epoch_s"] is not None:
        print(f"extrapolated (linearly in the sentence count, same length distribution) to "
              f"{TARGET_SENTENCES} sentences: {r['extrapolated_epoch_s']:.0f} s (CPU time "
              f"{r['epoch_cpu_s'] * TARGET_SENTENCES / r['sentences']:.0f} s); not measured")
    print(f"target: an epoch of {TARGET_SENTENCES} sentences in under 600 s, under 4 GiB")
    if "parse_s" in r:
        print(f"parse (mbr, the trained model, batches of {PARSE_BATCH}): {r['parse_s']:.1f} s "
              f"({r['parse_sent_per_s']:.1f} sent/s; CPU time {r['parse_cpu_s']:.1f} s; "
              f"{r['parsed']} parsed), {r['parse_ratio']:.2f} times the epoch's rate "
              f"(target >= 0.5)")
    if "mrp_s" in r:
        print(f"parse (max-rule-product, the trained model, batches of {PARSE_BATCH}): "
              f"{r['mrp_s']:.1f} s ({r['mrp_sent_per_s']:.1f} sent/s; CPU time "
              f"{r['mrp_cpu_s']:.1f} s; {r['mrp_parsed']} parsed), {r['mrp_ratio']:.2f} times "
              f"the epoch's rate (target >= 0.5)")


def main(argv: list[str] | None = None) -> dict:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nt", type=int, default=1024)
    parser.add_argument("--t", type=int, default=2048)
    parser.add_argument("--n", type=int, default=20)
    parser.add_argument("--batch", type=int, default=32)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--quick", action="store_true", help="tiny sizes, one repeat")
    parser.add_argument("--json", default=None, help="also write the figures here")
    parser.add_argument("--epoch", action="store_true",
                        help="time a training epoch instead (see the module docstring)")
    parser.add_argument("--sentences", type=int, default=TARGET_SENTENCES,
                        help="sentences in the epoch (below 10,000 the time is extrapolated)")
    parser.add_argument("--max-length", type=int, default=30)
    parser.add_argument("--vocab", type=int, default=5_000)
    parser.add_argument("--parse", action="store_true",
                        help="with --epoch: then decode the same sentences with mbr and "
                             "with max-rule-product")
    parser.add_argument("--run", default=None,
                        help="with --epoch --parse: decode with this trained run's model "
                             "(a run folder of independent productions) instead")
    parser.add_argument("--text", default=None,
                        help="with --run: the sentences (one a line, words split by spaces)")
    parser.add_argument("--probe", nargs="*", default=None, help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.sentences < 1 or args.max_length < 1 or args.vocab < 1:
        parser.error("--sentences, --max-length and --vocab must be at least 1")
    if (args.run is None) != (args.text is None) or (args.run and not args.epoch):
        parser.error("--run and --text go together, with --epoch")
    if args.threads is not None:
        torch.set_num_threads(args.threads)
    if args.probe is not None:  # subprocess body: one forward+backward, then the peak
        if args.probe:
            nt, t, n, batch = (int(x) for x in args.probe)
            forward_backward(random_problem(nt, t, n, batch))
        else:   # the baseline: a call on two words loads the pass's compiled loops (numba,
            forward_backward(random_problem(4, 4, 2, 1))  # about 130 MiB, once a process)
        print(vm_hwm_mib())
        return {}
    if args.quick:
        args.nt, args.t, args.n, args.batch, args.repeats = 16, 32, 8, 4, 1
        if args.epoch:
            args.sentences, args.max_length, args.vocab = 40, 8, 50
    tune_allocator()
    if args.epoch:
        result = {"date": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d %H:%M"),
                  "torch": torch.__version__, "threads": torch.get_num_threads(),
                  "nt": args.nt, "t": args.t, "batch": args.batch}
        if args.run:
            figures = trained_run(args.run, args.text, args.sentences, args.max_length,
                                  args.batch)
        else:
            figures = epoch(args.nt, args.t, args.sentences, args.max_length, args.vocab,
                            args.batch, args.parse)
        result.update(figures)
        print_epoch(result)
        if args.json:
            with open(args.json, "w") as out:
                json.dump(result, out, indent=2)
        return result
    progress(f"matmul rate, then NT={args.nt} T={args.t} n={args.n} batch={args.batch}")
    rate = matmul_gflops(args.repeats)
    problem = random_problem(args.nt, args.t, args.n, args.batch)
    fb_s = best_time(lambda: forward_backward(problem), args.repeats)
    rate = max(rate, matmul_gflops(args.repeats))
    work = independent_work(args.nt, args.t, args.n) * args.batch / 1e9
    floor_s = work / rate
    spec = [str(x) for x in (args.nt, args.t, args.n, args.batch)]
    peak_mib = run_probe(spec, __file__) - run_probe([], __file__)
    result = {"date": datetime.datetime.now(datetime.timezone.utc).strftime("%Y-%m-%d"),
              "torch": torch.__version__, "threads": torch.get_num_threads(),
              "repeats": args.repeats, "nt": args.nt, "t": args.t, "n": args.n,
              "batch": args.batch, "matmul_gflops": rate, "matmul_gflop": work,
              "floor_s": floor_s, "fb_s": fb_s, "ratio": fb_s / floor_s, "target": 2.0,
              "sent_per_s": args.batch / fb_s, "peak_mib_above_idle": peak_mib}
    print(f"independent productions, {result['date']}, torch {result['torch']}, "
          f"{result['threads']} threads, min of {args.repeats} repeats")
    print(f"NT={args.nt} T={args.t} n={args.n} batch={args.batch}: forward+backward "
          f"{fb_s:.3f} s ({result['sent_per_s']:.1f} sent/s); its matrix products are "
          f"{work:.1f} GFLOP, at {rate:.1f} GFLOP/s at least {floor_s:.3f} s: ratio "
          f"{result['ratio']:.2f} (target <= 2); peak {peak_mib:.0f} MiB above idle")
    if args.json:
        with open(args.json, "w") as out:
            json.dump(result, out, indent=2)
    return result


if __name__ == "__main__":
    main()
