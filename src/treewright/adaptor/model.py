"""An adaptor grammar's state: one Pitman-Yor restaurant per adapted symbol, over a PCFG base.

Johnson, Griffiths & Goldwater 2007, "Adaptor Grammars: A Framework for Specifying
Compositional Nonparametric Bayesian Models" (NIPS 19). An adapted symbol A draws its subtrees
from a Pitman-Yor process (Pitman & Yor 1997, "The two-parameter Poisson-Dirichlet distribution
derived from a stable subordinator") whose base distribution is the PCFG's expansion of A. In
the Chinese-restaurant representation each draw is a customer: with n customers at K tables,
the next one joins table k (with c_k customers) with probability (c_k - a) / (n + b), or opens
a new table with probability (K a + b) / (n + b), whose label is a new subtree of A drawn from
the base: a rule of A, whose adapted children are in turn customers of their own restaurants.
A table's label is its whole subtree; the customers of the label's adapted children are seated
once, when the table opens, and leave when it closes.

Trees are tuples of ints, hashable so that they key the restaurants: `(A, w)` is the lexical
rule A -> word id w, `(A, left, right)` the binary rule A -> B C with the subtrees of B and C.
Base rule probabilities are fixed: they are the grammar's rules as read (no Dirichlet
resampling of them).
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass
from functools import cached_property
from typing import Callable

import numpy as np

from treewright.grammar import Grammar

Tree = tuple
FIXED_MEMO = 200_000  # fixed base probabilities kept at most (then the memo is cleared)


def is_leaf(tree: Tree) -> bool:
    return len(tree) == 2


def tree_yield(tree: Tree) -> tuple[int, ...]:
    """The word ids a tree covers, left to right."""
    if is_leaf(tree):
        return (tree[1],)
    return tree_yield(tree[1]) + tree_yield(tree[2])


@dataclass(frozen=True)
class Rules:
    """A grammar's rules as float64 probabilities, with its adaptors, for the sampler.

    root (NT,), binary (NT, S, S), lexical (S, V) as in `Grammar` but probabilities, not logs;
    adapted (S,) bool, discount (S,) and concentration (S,) per symbol (0 for the others).
    """

    names: list[str]
    num_nt: int
    root: np.ndarray
    binary: np.ndarray
    lexical: np.ndarray
    adapted: np.ndarray
    discount: np.ndarray
    concentration: np.ndarray

    @classmethod
    def from_grammar(cls, grammar: Grammar) -> "Rules":
        names = grammar.symbols
        s = len(names)
        adapted = np.zeros(s, dtype=bool)
        discount = np.zeros(s)
        concentration = np.zeros(s)
        for name, (a, b) in grammar.adapted.items():
            k = names.index(name)
            adapted[k], discount[k], concentration[k] = True, a, b
        return cls(names, len(grammar.nonterminals), grammar.root.double().exp().numpy(),
                   grammar.binary.double().exp().numpy(), grammar.lexical.double().exp().numpy(),
                   adapted, discount, concentration)

    @cached_property
    def adapted_ids(self) -> list[int]:
        return [a for a in range(len(self.names)) if self.adapted[a]]

    @cached_property
    def fixed_base(self) -> np.ndarray:
        """(S,) bool: symbols whose every subtree has a base probability (`Cache.base`) that
        does not depend on the restaurants: no rule below them has an adapted child (the
        unigram word grammar's Word, Chars and Char; not Words, whose children are Words)."""
        fixed = np.ones(len(self.names), dtype=bool)
        parent, left, right = np.nonzero(self.binary)
        plain = ~self.adapted
        while True:  # a parent of an adapted or unfixed child is unfixed, until none changes
            unfixed = parent[~(plain[left] & fixed[left] & plain[right] & fixed[right])]
            if not fixed[unfixed].any():
                return fixed
            fixed[unfixed] = False

    @cached_property
    def py(self) -> "PlainRules":
        """The same numbers as Python lists and floats: the sampler reads them one at a time,
        and a Python float's arithmetic is the same float64 arithmetic without numpy's cost
        per scalar."""
        return PlainRules(self.adapted.tolist(), self.fixed_base.tolist(),
                          self.discount.tolist(), self.concentration.tolist(),
                          self.lexical.tolist(), self.binary.tolist())

    def tempered(self, power: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """root (NT,), binary (NT, S, S) and lexical (S, V) raised to `power` (the arrays
        themselves at power 1); the last power asked for is kept, since a sweep asks for the
        same one at every sentence."""
        if power == 1.0:
            return self.root, self.binary, self.lexical
        memo = self._tempered_memo
        if memo.get("power") != power:
            memo.update(power=power, rules=(self.root ** power, self.binary ** power,
                                            self.lexical ** power))
        return memo["rules"]

    @cached_property
    def _tempered_memo(self) -> dict:
        return {}

    def rule(self, tree: Tree) -> float:
        """The probability of the rule at the top of `tree`."""
        if is_leaf(tree):
            return self.py.lexical[tree[0]][tree[1]]
        return self.py.binary[tree[0]][tree[1][0]][tree[2][0]]


@dataclass(frozen=True)
class PlainRules:
    """`Rules` as lists: adapted, fixed_base, discount, concentration (S,); lexical [S][V];
    binary [NT][S][S]."""

    adapted: list[bool]
    fixed_base: list[bool]
    discount: list[float]
    concentration: list[float]
    lexical: list[list[float]]
    binary: list[list[list[float]]]


class Table:
    """One table of a restaurant: its label (a subtree), its customers, and the tables of the
    label's adapted children (seated when it opened)."""

    __slots__ = ("symbol", "label", "count", "children")

    def __init__(self, symbol: int, label: Tree, count: int, children: list[int]):
        self.symbol, self.label, self.count, self.children = symbol, label, count, children


# choose(table ids with this label, weights of those tables then of a new one) -> index into
# the weights
Chooser = Callable[[list[int], list[float]], int]
# Where an analysis's customers sit: per top customer, in seating order, (its table, the Plan
# of that table's label's adapted children). It describes the seating whichever sentence
# opened each table, so an analysis taken out can be put back exactly.
Plan = list[tuple[int, list]]


class Cache:
    """The restaurants of every adapted symbol, with the indexes the proposal reads.

    Orders are insertion orders and are part of the state (a checkpoint keeps them), so that a
    resumed chain sums and draws in the same order as one never stopped.
    """

    def __init__(self, rules: Rules):
        self.rules = rules
        s = len(rules.names)
        self.tables: dict[int, Table] = {}
        self.labels: list[dict[Tree, list[int]]] = [{} for _ in range(s)]   # label -> tables
        self.label_customers: list[dict[Tree, int]] = [{} for _ in range(s)]
        self.by_yield: list[dict[tuple, list[Tree]]] = [{} for _ in range(s)]
        self.label_yield: list[dict[Tree, tuple]] = [{} for _ in range(s)]
        # yield -> [customers, tables] of the labels with that yield, summed
        self.yield_counts: list[dict[tuple, list[int]]] = [{} for _ in range(s)]
        # prefix -> the number of cached yields that start with it (a yield is its own prefix)
        self.prefixes: list[Counter] = [Counter() for _ in range(s)]
        self.customers = [0] * s   # n per symbol
        self.num_tables = [0] * s  # K per symbol
        self.next_id = 0
        self._fixed_base: dict[Tree, float] = {}

    # ---- the Pitman-Yor predictive -----------------------------------------------------------

    def new_table_prob(self, a: int) -> float:
        """(K a + b) / (n + b): the probability that the next customer of `a` opens a table (one
        for the first customer, also when b < 0)."""
        n = self.customers[a]
        if n == 0:
            return 1.0
        r = self.rules.py
        return (self.num_tables[a] * r.discount[a] + r.concentration[a]) / (n + r.concentration[a])

    def reuse_prob(self, a: int, label: Tree) -> float:
        """(n_y - m_y a) / (n + b): the probability that the next customer of `a` joins one of
        the m_y tables labelled y, with n_y customers between them."""
        tables = self.labels[a].get(label)
        if not tables:
            return 0.0
        r = self.rules.py
        return (self.label_customers[a][label] - len(tables) * r.discount[a]) / \
            (self.customers[a] + r.concentration[a])

    def reuse_tempered(self, a: int, label: Tree, power: float) -> float:
        """The sum over the tables labelled `label` of each one's probability of being joined,
        (c_k - a) / (n + b), raised to `power`: the weight of reusing the label under the
        joint raised to `power`, whose seatings are summed after tempering (at power 1 it is
        `reuse_prob`)."""
        tables = self.labels[a].get(label)
        if not tables:
            return 0.0
        r = self.rules.py
        scale = self.customers[a] + r.concentration[a]
        return math.fsum(((self.tables[t].count - r.discount[a]) / scale) ** power
                         for t in tables)

    def reuse_total(self, a: int, span: tuple) -> float:
        """The summed reuse probability of every cached label of `a` whose yield is `span`
        (the weight of the proposal's rule a -> span): (sum n_y - a sum m_y) / (n + b)."""
        counts = self.yield_counts[a].get(span)
        if counts is None:
            return 0.0
        customers, tables = counts
        r = self.rules.py
        return (customers - tables * r.discount[a]) / (self.customers[a] + r.concentration[a])

    def predictive(self, tree: Tree) -> float:
        """The probability that a draw of the tree's top symbol, in the current state, is the
        tree: reuse plus a new table with this label, for an adapted symbol; the base
        expansion otherwise. Summed over every derivation, it is the probability the proposal
        grammar (`proposal`) gives the tree."""
        a = tree[0]
        if not self.rules.py.adapted[a]:
            return self.base(tree)
        return self.reuse_prob(a, tree) + self.new_table_prob(a) * self.base(tree)

    def base(self, tree: Tree) -> float:
        """The rule at the top times the predictive of each child. For a symbol with a fixed
        base (`Rules.fixed_base`) the value never changes, so it is kept in a memo that holds
        exactly what this recursion returns: the state and the draws do not depend on what
        the memo holds."""
        if self.rules.py.fixed_base[tree[0]]:
            p = self._fixed_base.get(tree)
            if p is None:
                p = self._fixed_base[tree] = self._base(tree)
                if len(self._fixed_base) > FIXED_MEMO:
                    self._fixed_base.clear()
            return p
        return self._base(tree)

    def _base(self, tree: Tree) -> float:
        p = self.rules.rule(tree)
        if not is_leaf(tree) and p > 0.0:
            p *= self.predictive(tree[1]) * self.predictive(tree[2])
        return p

    def cached(self, a: int, span: tuple) -> list[tuple[Tree, float]]:
        """(label, reuse probability) of each cached label of `a` whose yield is `span`."""
        return [(label, self.reuse_prob(a, label)) for label in self.by_yield[a].get(span, ())]

    # ---- seating and unseating ---------------------------------------------------------------

    def seat(self, tree: Tree, choose: Chooser | None = None, plan: Plan | None = None,
             power: float = 1.0) -> tuple[list[int], float, float]:
        """Seat every customer of one analysis (without its root rule) in pre-order.

        Either `choose` picks, at each customer, among the tables with its label and a new
        table, or `plan` (from `plan`) dictates the tables: an existing one is joined, a closed
        one reopens under its old id with its label's children seated by the plan too.
        Returns (top tables: the customers the analysis itself made; log P: the probability
        of the base rules and seating choices under the generative process, each customer
        given those before it; log R: the probability of these choices in proportion to the
        weights that `choose` is given, given the labels). `choose` is given each choice's
        probability under the process raised to `power` (1/T when annealing at temperature
        T, so that the seating proposal matches the tempered target: with untempered choices
        the ratio P^(1/T) / R varied with the table drawn, and at T = 3 most proposals were
        rejected).
        """
        logs = [0.0, 0.0]  # log P, log R

        def visit(node: Tree, plans) -> list[int]:
            a = node[0]
            if self.rules.py.adapted[a]:
                return [customer(node, None if plans is None else next(plans))]
            logs[0] += math.log(self.rules.rule(node))
            if is_leaf(node):
                return []
            return visit(node[1], plans) + visit(node[2], plans)

        def customer(node: Tree, planned) -> int:
            a = node[0]
            ids = list(self.labels[a].get(node, ()))
            n, disc, conc = self.customers[a], self.rules.py.discount[a], \
                self.rules.py.concentration[a]
            weights = [(self.tables[t].count - disc) / (n + conc) for t in ids]
            new = self.new_table_prob(a)
            weights.append(new * self.base(node))
            proposed = weights if power == 1.0 else [w ** power for w in weights]
            if planned is None:
                pick, table, kids = choose(ids, proposed), None, None
            else:
                table, kids = planned
                pick = ids.index(table) if table in ids else len(ids)
            logs[1] += math.log(proposed[pick] / math.fsum(proposed))
            if pick < len(ids):
                logs[0] += math.log(weights[pick])
                self._join(ids[pick])
                return ids[pick]
            logs[0] += math.log(new) + math.log(self.rules.rule(node))
            table = self._open(a, node, table)
            if not is_leaf(node):
                inner = None if kids is None else iter(kids)
                self.tables[table].children = visit(node[1], inner) + visit(node[2], inner)
            return table

        tops = visit(tree, None if plan is None else iter(plan))
        return tops, logs[0], logs[1]

    def plan(self, tops: list[int]) -> Plan:
        """The seating of an analysis whose own customers sit at `tops` (see `Plan`)."""
        return [(t, self.plan(self.tables[t].children)) for t in tops]

    def unseat(self, tops: list[int]) -> None:
        """Remove an analysis's customers; a table left empty closes and unseats its label's
        children."""
        for table in tops:
            self._leave(table)

    def _join(self, table_id: int) -> None:
        t = self.tables[table_id]
        t.count += 1
        self.customers[t.symbol] += 1
        self.label_customers[t.symbol][t.label] += 1
        self.yield_counts[t.symbol][self.label_yield[t.symbol][t.label]][0] += 1

    def _open(self, a: int, label: Tree, table_id: int | None = None) -> int:
        if table_id is None:
            table_id = self.next_id
        self.next_id = max(self.next_id, table_id + 1)
        self.tables[table_id] = Table(a, label, 1, [])
        if label not in self.labels[a]:
            self.labels[a][label] = []
            self.label_customers[a][label] = 0
            self._add_yield(a, label)
        self.labels[a][label].append(table_id)
        self.label_customers[a][label] += 1
        counts = self.yield_counts[a][self.label_yield[a][label]]
        counts[0] += 1
        counts[1] += 1
        self.customers[a] += 1
        self.num_tables[a] += 1
        return table_id

    def _add_yield(self, a: int, label: Tree) -> None:
        span = self.label_yield[a][label] = tree_yield(label)
        if span not in self.by_yield[a]:
            self.by_yield[a][span] = []
            self.yield_counts[a][span] = [0, 0]
            for end in range(1, len(span) + 1):
                self.prefixes[a][span[:end]] += 1
        self.by_yield[a][span].append(label)

    def _leave(self, table_id: int) -> None:
        t = self.tables[table_id]
        a = t.symbol
        t.count -= 1
        self.customers[a] -= 1
        self.label_customers[a][t.label] -= 1
        span = self.label_yield[a][t.label]
        counts = self.yield_counts[a][span]
        counts[0] -= 1
        if t.count > 0:
            return
        counts[1] -= 1
        del self.tables[table_id]
        self.num_tables[a] -= 1
        same = self.labels[a][t.label]
        same.remove(table_id)
        if not same:
            del self.labels[a][t.label]
            del self.label_customers[a][t.label]
            del self.label_yield[a][t.label]
            self.by_yield[a][span].remove(t.label)
            if not self.by_yield[a][span]:
                del self.by_yield[a][span]
                del self.yield_counts[a][span]
                for end in range(1, len(span) + 1):
                    self.prefixes[a][span[:end]] -= 1
                    if not self.prefixes[a][span[:end]]:
                        del self.prefixes[a][span[:end]]
        for child in t.children:
            self._leave(child)

    # ---- the checkpoint ----------------------------------------------------------------------

    def state(self) -> dict:
        """The restaurants as JSON values, in their orders."""
        return {"next_id": self.next_id,
                "tables": [[k, t.symbol, _to_json(t.label), t.count, t.children]
                           for k, t in self.tables.items()],
                "labels": [[a, _to_json(label), ids] for a, by_label in enumerate(self.labels)
                           for label, ids in by_label.items()]}

    @classmethod
    def from_state(cls, rules: Rules, state: dict) -> "Cache":
        cache = cls(rules)
        for a, label, ids in state["labels"]:
            label = _from_json(label)
            cache.labels[a][label] = list(ids)
            cache.label_customers[a][label] = 0
            cache._add_yield(a, label)
        for k, a, label, count, children in state["tables"]:
            label = _from_json(label)
            cache.tables[k] = Table(a, label, count, list(children))
            cache.label_customers[a][label] += count
            counts = cache.yield_counts[a][cache.label_yield[a][label]]
            counts[0] += count
            counts[1] += 1
            cache.customers[a] += count
            cache.num_tables[a] += 1
        cache.next_id = state["next_id"]
        return cache


def _to_json(tree: Tree) -> list:
    return [tree[0], tree[1]] if is_leaf(tree) else [tree[0], _to_json(tree[1]),
                                                     _to_json(tree[2])]


def _from_json(value: list) -> Tree:
    if len(value) == 2:
        return (int(value[0]), int(value[1]))
    return (int(value[0]), _from_json(value[1]), _from_json(value[2]))
