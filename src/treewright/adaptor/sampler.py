"""Sentence-blocked Metropolis-Hastings for adaptor grammars, with several chains and a JSON
checkpoint from which a run resumes bit for bit.

Johnson, Griffiths & Goldwater 2007, "Adaptor Grammars: A Framework for Specifying
Compositional Nonparametric Bayesian Models", section 4: for each sentence in turn, its
analysis is taken out of the restaurants, a new tree is drawn from the PCFG approximation of
the rest (`proposal.ProposalChart`), and accepted with the Metropolis-Hastings probability

    min(1, P(new) R(old) Q(old) / (P(old) R(new) Q(new)))

The state is the trees with their seating (which table each customer sits at). P is the
probability of a sentence's rules and seating choices under the generative process given
every other sentence (customers of one sentence see those seated before them, so a table it
opens can serve it again). Q is the proposal's probability of the tree. R is the probability
of the seating given the tree: the new tree's customers are seated one by one among the tables
with their label and a new table, in proportion to their probabilities (`Cache.seat`). The
ratio is therefore the exact one on the joint state, whose tree marginal is the adaptor
grammar's posterior.

Annealing: a sweep at temperature T targets the joint state's probability raised to 1/T, so
P(new) / P(old) enters the ratio raised to 1/T, and the proposal's weights are raised to 1/T
too (`proposal`), so that it stays close to the tempered target; so are the seating choices R
(`Cache.seat`). Above 1 the target is
flatter, which lets a chain leave the segmentation it started in; a schedule (`annealing`)
brings T down to 1, where the chain samples the posterior again. Johnson, Griffiths &
Goldwater 2007 anneal their sampler this way (from memory: we did not check their schedule);
the linear schedule here is ours.

Base rule probabilities stay fixed at the grammar's values. The discount and concentration of
each adaptor stay at the grammar's values too, unless `run(..., hyperparameters=True)`
resamples them after every sweep (`hyper`); each chain then has its own.
"""

from __future__ import annotations

import dataclasses
import json
import math
from pathlib import Path
from typing import Callable, Sequence

import numpy as np

from treewright.adaptor import hyper
from treewright.adaptor.model import Cache, Rules, Tree, _from_json, _to_json
from treewright.adaptor.proposal import ProposalChart
from treewright.adaptor.segment import lexicon, segment
from treewright.errors import InputError
from treewright.grammar import Grammar, parse_grammar

STARTS = ("batch", "incremental")  # the first states `Chain.initialize` draws
CHECKPOINT_KIND = "treewright adaptor chains"
CHECKPOINT_VERSION = 1


class Analysis:
    """One sentence's tree and the tables its own customers sit at (`tops`)."""

    __slots__ = ("tree", "tops")

    def __init__(self, tree: Tree, tops: list[int]):
        self.tree, self.tops = tree, tops


class Chain:
    """One Markov chain: its restaurants, the analysis of every sentence, and its random
    generator (PCG64, whose state a checkpoint stores)."""

    def __init__(self, rules: Rules, sentences: list[list[int]], rng: np.random.Generator):
        self.rules, self.sentences, self.rng = rules, sentences, rng
        self.cache = Cache(rules)
        self.analyses: list[Analysis] = []
        self.sweeps = 0
        self.proposed = 0
        self.accepted = 0

    def initialize(self, start: str = "batch") -> None:
        """The first state (Johnson & Goldwater 2009 compare the two).

        batch        every sentence's tree drawn from the base PCFG alone (the proposal of
                     empty restaurants), independently of the others; then all are seated
                     in corpus order
        incremental  each sentence in order gets a tree drawn from the proposal given those
                     before it (a draw of the generative process' sequential approximation;
                     no rejection)

        An incremental start fixes whatever units the first sentences happen to be cut into
        before the rest are read, and the sentence-blocked sampler rarely undoes a unit that
        many sentences share: on the 400 Ostreli utterances it ended 200 sweeps at token F1
        0.52 (log joint -9,911), a batch start at 0.86 (-7,725) and the gold segmentation
        scores -6,811 (docs/adaptor_notes.md).
        """
        if start not in STARTS:
            raise ValueError(f"start is one of {', '.join(STARTS)}, not {start!r}")
        if start == "incremental":
            for words in self.sentences:
                tree = ProposalChart(self.cache, words).sample(self.rng)
                tops, _, _ = self.cache.seat(tree, self._draw_seat)
                self.analyses.append(Analysis(tree, tops))
            return
        empty = Cache(self.rules)
        trees = [ProposalChart(empty, words).sample(self.rng) for words in self.sentences]
        for tree in trees:
            tops, _, _ = self.cache.seat(tree, self._draw_seat)
            self.analyses.append(Analysis(tree, tops))

    def sweep(self, temperature: float = 1.0) -> None:
        """One Metropolis-Hastings step for every sentence, in corpus order, at `temperature`."""
        for k in range(len(self.sentences)):
            self.step(k, temperature)
        self.sweeps += 1

    def step(self, k: int, temperature: float = 1.0) -> bool:
        """Resample sentence k's analysis, targeting the joint probability to the power
        1 / temperature; True when the proposal was accepted."""
        old = self.analyses[k]
        cache, root = self.cache, self.rules.root
        plan = cache.plan(old.tops)
        cache.unseat(old.tops)
        chart = ProposalChart(cache, self.sentences[k], temperature)
        tree = chart.sample(self.rng)
        # Q and P both include the root rule (it differs between trees with other tops); Q's
        # normalizer, the chart's total, is the same for both and cancels.
        log_q_old = math.log(chart.weight(old.tree))
        log_q_new = math.log(chart.weight(tree))
        # P and R of the old seating, replayed in the state without it, then taken out again.
        power = 1.0 / temperature
        tops, logp_old, logr_old = cache.seat(old.tree, plan=plan, power=power)
        cache.unseat(tops)
        tops, logp_new, logr_new = cache.seat(tree, self._draw_seat, power=power)
        logp_old += math.log(root[old.tree[0]])
        logp_new += math.log(root[tree[0]])
        log_ratio = (logp_new - logp_old) / temperature - (logr_new + log_q_new) + \
            (logr_old + log_q_old)
        self.proposed += 1
        if log_ratio >= 0.0 or self.rng.random() < math.exp(log_ratio):
            self.analyses[k] = Analysis(tree, tops)
            self.accepted += 1
            return True
        cache.unseat(tops)
        tops, _, _ = cache.seat(old.tree, plan=plan)
        self.analyses[k] = Analysis(old.tree, tops)
        return False

    def _draw_seat(self, ids: list[int], weights: list[float]) -> int:
        total = math.fsum(weights)
        u = self.rng.random() * total
        acc = 0.0
        for pick, w in enumerate(weights):
            acc += w
            if u < acc:
                return pick
        return max(p for p, w in enumerate(weights) if w > 0.0)

    def resample_hyperparameters(self) -> None:
        """Slice-sample each adapted symbol's discount, then concentration, given the
        seating (`hyper.resample`); the chain's rules take the new values."""
        discount, concentration = self.rules.discount.copy(), self.rules.concentration.copy()
        for a in self.rules.adapted_ids:
            counts = [t.count for t in self.cache.tables.values() if t.symbol == a]
            discount[a], concentration[a] = hyper.resample(
                counts, float(discount[a]), float(concentration[a]), self.rng)
        self._set_hyperparameters(discount, concentration)

    def _set_hyperparameters(self, discount: np.ndarray, concentration: np.ndarray) -> None:
        self.rules = dataclasses.replace(self.rules, discount=discount,
                                         concentration=concentration)
        self.cache.rules = self.rules

    def log_joint(self) -> float:
        """log P of every tree and seating, the sentences seated in corpus order from empty
        restaurants (the seating is exchangeable, so the order does not change the value)."""
        fresh = Cache(self.rules)
        total = 0.0
        for analysis in self.analyses:
            _, logp, _ = fresh.seat(analysis.tree, plan=self.cache.plan(analysis.tops))
            total += logp + math.log(self.rules.root[analysis.tree[0]])
        return total

    def state(self) -> dict:
        return {"rng": self.rng.bit_generator.state, "sweeps": self.sweeps,
                "proposed": self.proposed, "accepted": self.accepted,
                "discount": self.rules.discount.tolist(),
                "concentration": self.rules.concentration.tolist(),
                "cache": self.cache.state(),
                "analyses": [[_to_json(a.tree), a.tops] for a in self.analyses]}

    @classmethod
    def from_state(cls, rules: Rules, sentences: list[list[int]], state: dict) -> "Chain":
        bits = np.random.PCG64()
        bits.state = state["rng"]
        chain = cls(rules, sentences, np.random.Generator(bits))
        chain.sweeps, chain.proposed = state["sweeps"], state["proposed"]
        chain.accepted = state["accepted"]
        chain.cache = Cache.from_state(rules, state["cache"])
        chain.analyses = [Analysis(_from_json(t), list(tops)) for t, tops in state["analyses"]]
        discount = np.array(state["discount"], dtype=float)
        concentration = np.array(state["concentration"], dtype=float)
        if discount.shape != rules.discount.shape or concentration.shape != discount.shape:
            raise ValueError("a discount and concentration per symbol")
        chain._set_hyperparameters(discount, concentration)
        return chain


class AdaptorSampler:
    """Several independent chains of the Metropolis-Hastings sampler over one corpus.

    grammar    a `Grammar` with `@adapted` symbols (one without any is a plain PCFG, and the
               sampler then draws exact posterior trees: every proposal is accepted)
    sentences  lists of terminals of the grammar (words, or characters: `segment.characters`)
    chains     the number of chains; chain c draws from the c-th child of `seed`'s
               `numpy.random.SeedSequence`, so chains are independent and reproducible
    start      each chain's first state: "batch" (every tree from the base PCFG) or
               "incremental" (`Chain.initialize`)
    """

    def __init__(self, grammar: Grammar, sentences: Sequence[Sequence[str]], chains: int = 1,
                 seed: int = 0, source: str = "<sentences>", start: str = "batch"):
        if chains < 1:
            raise ValueError("chains must be at least 1")
        self.grammar = grammar
        self.rules = Rules.from_grammar(grammar)
        self.words = [list(s) for s in sentences]
        self.sentences = _encode(grammar, self.words, source)
        self.seed = seed
        self.chains: list[Chain] = []
        for child in np.random.SeedSequence(seed).spawn(chains):
            chain = Chain(self.rules, self.sentences, np.random.Generator(np.random.PCG64(child)))
            chain.initialize(start)
            self.chains.append(chain)

    def run(self, sweeps: int, progress: Callable[[int, int], None] | None = None,
            temperature: Callable[[int], float] | None = None,
            hyperparameters: bool = False) -> None:
        """`sweeps` more sweeps of every chain; `progress(done, total)` after each sweep;
        `temperature(k)` the temperature of a chain's sweep k (counted from 0 over the whole
        run, resumed or not; `annealing` makes one), 1 when not given; `hyperparameters`:
        resample every adaptor's discount and concentration after each sweep."""
        total = sweeps * len(self.chains)
        done = 0
        for chain in self.chains:
            for _ in range(sweeps):
                chain.sweep(1.0 if temperature is None else temperature(chain.sweeps))
                if hyperparameters:
                    chain.resample_hyperparameters()
                done += 1
                if progress is not None:
                    progress(done, total)

    def trees(self, chain: int = 0) -> list[Tree]:
        return [a.tree for a in self.chains[chain].analyses]

    def segmentations(self, symbol: str, chain: int = 0) -> list[list[str]]:
        """Each sentence cut at the edges of its top-most `symbol` subtrees (`segment`)."""
        a = self._symbol(symbol)
        return [segment(t, a, words) for t, words in zip(self.trees(chain), self.words)]

    def lexicon(self, symbol: str, chain: int = 0) -> list[tuple[str, int, int]]:
        """The cached subtrees of an adapted symbol: (characters, customers, tables)."""
        a = self._symbol(symbol)
        if not self.rules.adapted[a]:
            raise ValueError(f"{symbol} is not adapted")
        return lexicon(self.chains[chain].cache, a, self.grammar.vocab.words)

    def _symbol(self, name: str) -> int:
        if name not in self.rules.names:
            raise ValueError(f"the grammar has no symbol {name}")
        return self.rules.names.index(name)

    # ---- the checkpoint ----------------------------------------------------------------------

    def state(self) -> dict:
        """Everything a resumed run needs, as JSON values: the grammar's text, the sentences
        and each chain's restaurants, analyses and generator state."""
        return {"kind": CHECKPOINT_KIND, "version": CHECKPOINT_VERSION,
                "grammar": self.grammar.to_text(), "sentences": self.words, "seed": self.seed,
                "chains": [chain.state() for chain in self.chains]}

    def save(self, path: str | Path) -> None:
        from treewright.safeio import atomic_write_text
        atomic_write_text(Path(path), json.dumps(self.state()) + "\n")

    @classmethod
    def load(cls, path: str | Path) -> "AdaptorSampler":
        path = Path(path)
        try:
            state = json.loads(path.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise InputError("no such checkpoint", path=str(path)) from None
        except (UnicodeDecodeError, json.JSONDecodeError) as err:
            raise InputError(f"not a JSON checkpoint ({err})", path=str(path)) from None
        return cls.from_state(state, source=str(path))

    @classmethod
    def from_state(cls, state: dict, source: str = "<checkpoint>") -> "AdaptorSampler":
        if not isinstance(state, dict) or state.get("kind") != CHECKPOINT_KIND \
                or state.get("version") != CHECKPOINT_VERSION:
            raise InputError(f"not a checkpoint of adaptor chains, version "
                             f"{CHECKPOINT_VERSION}", path=source)
        sampler = cls.__new__(cls)
        sampler.grammar = parse_grammar(state.get("grammar", ""), source=source)
        sampler.rules = Rules.from_grammar(sampler.grammar)
        try:
            sampler.words = [list(s) for s in state["sentences"]]
            sampler.sentences = _encode(sampler.grammar, sampler.words, source)
            sampler.seed = state["seed"]
            sampler.chains = [Chain.from_state(sampler.rules, sampler.sentences, c)
                              for c in state["chains"]]
        except (KeyError, TypeError, ValueError, IndexError) as err:
            raise InputError(f"the checkpoint's chains are malformed ({type(err).__name__}: "
                             f"{err})", path=source) from None
        return sampler


def annealing(start: float, sweeps: int) -> Callable[[int], float]:
    """A temperature schedule for `AdaptorSampler.run`: `start` at sweep 0, falling linearly to
    1 at sweep `sweeps` and 1 from then on (no annealing when `start` is 1 or `sweeps` 0)."""
    if not start >= 1.0 or sweeps < 0:
        raise ValueError("annealing starts at a temperature of at least 1, over sweeps >= 0")

    def temperature(k: int) -> float:
        if k >= sweeps:
            return 1.0
        return start + (1.0 - start) * k / sweeps

    return temperature


def _encode(grammar: Grammar, sentences: list[list[str]], source: str) -> list[list[int]]:
    """Word ids of every sentence; a terminal the grammar lacks is an error naming the
    sentence (its line, counting from one), since the sampler cannot analyse it."""
    out = []
    for k, words in enumerate(sentences):
        if not words:
            raise InputError("an empty sentence has no analysis", path=source, line=k + 1)
        ids = [grammar.vocab.index.get(w, -1) for w in words]
        if -1 in ids:
            raise InputError(f"{words[ids.index(-1)]!r} is not a terminal of the grammar",
                             path=source, line=k + 1)
        out.append(ids)
    return out
