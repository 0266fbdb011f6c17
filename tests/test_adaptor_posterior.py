"""The boundary-posterior segmentation of `adaptor.posterior`, by hand; its estimate against
the enumerated posterior is in tests/test_adaptor.py, and the run's use of it in
tests/test_adaptor_run.py."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from treewright.adaptor import AdaptorSampler, parse_utterances
from treewright.adaptor.grammars import unigram_word_grammar
from treewright.adaptor.posterior import BoundaryTally, recorded_sweeps
from treewright.errors import InputError


def _tally():
    # Two utterances of 4 and 2 characters, 4 analyses: counts set by hand.
    tally = BoundaryTally([4, 2])
    tally.counts[0][:] = [3, 2, 0]   # position 1 by 3 of 4, position 2 by exactly half
    tally.counts[1][:] = [4]
    tally.samples = 4
    return tally


def test_a_position_is_cut_when_more_than_half_cut_it():
    tally = _tally()
    assert [s.tolist() for s in tally.shares()] == [[0.75, 0.5, 0.0], [1.0]]
    # Exactly half is not more than half: position 2 stays uncut.
    assert tally.positions() == [[1], [1]]
    assert tally.segmentations([list("kelu"), list("ma")]) == [["k", "elu"], ["m", "a"]]


def test_nothing_recorded_is_an_error_not_an_empty_segmentation():
    with pytest.raises(ValueError, match="no analyses"):
        BoundaryTally([3]).positions()
    with pytest.raises(ValueError, match="no analyses"):
        BoundaryTally([3]).positions("expected-f1")
    with pytest.raises(ValueError, match="unknown cut rule 'most'"):
        _tally().positions("most")


def _approximate_expected_f1(shares, chosen):
    # Jansche (2005): the expected overlap over the expected sizes, written out here.
    return 2 * sum(shares[i] for i in chosen) / (len(chosen) + sum(shares))


def test_expected_f1_by_hand():
    # Shares 0.75, 0.5, 0 and 1 (sum 2.25). Counts >= 1 or >= 2 cut the same three positions:
    # 2 * 2.25 / (3 + 2.25) = 6/7; >= 3 cuts two: 3.5 / 4.25; >= 4 one: 2 / 3.25. The tie of
    # thresholds 1 and 2 goes to the higher one.
    tally = _tally()
    assert [tally.expected_f1(t) for t in (1, 2, 3, 4)] == pytest.approx(
        [6 / 7, 6 / 7, 3.5 / 4.25, 2 / 3.25], abs=1e-15)
    assert tally.threshold("expected-f1") == 2 and tally.threshold() == 3
    assert tally.positions("expected-f1") == [[1, 2], [1]]
    assert tally.segmentations([list("kelu"), list("ma")], "expected-f1") == [
        ["k", "e", "lu"], ["m", "a"]]


def test_no_boundary_anywhere_expects_nothing_and_cuts_nothing():
    tally = BoundaryTally([3, 2])
    tally.samples = 5
    assert tally.expected_f1(1) == 0.0
    assert tally.positions("expected-f1") == [[], []]


@pytest.mark.parametrize("seed", range(6))
def test_expected_f1_cuts_the_best_subset_of_all(seed):
    # Reference: brute-force enumeration of every subset of the 10 positions, each scored by
    # the approximate expected F1 written out above; the rule's cut must score the maximum.
    rng = np.random.default_rng(seed)
    tally = BoundaryTally([5, 4, 4])
    tally.samples = 7
    for c in tally.counts:
        c[:] = rng.integers(0, 8, size=len(c))
    shares = np.concatenate(tally.shares()).tolist()
    best = max(_approximate_expected_f1(shares, chosen)
               for k in range(len(shares) + 1)
               for chosen in itertools.combinations(range(len(shares)), k))
    cut = [offset + p - 1 for offset, ps in zip((0, 4, 7), tally.positions("expected-f1"))
           for p in ps]
    assert _approximate_expected_f1(shares, cut) == pytest.approx(best, abs=1e-12)
    assert tally.expected_f1(tally.threshold("expected-f1")) == pytest.approx(best, abs=1e-12)


def test_the_threshold_is_half_the_f1_it_expects():
    # Lipton, Elkan & Naryanaswamy (2014): with calibrated probabilities, the F1-optimal rule
    # cuts every position whose probability is above half the optimal F1, and none below.
    rng = np.random.default_rng(11)
    tally = BoundaryTally([30] * 200)
    tally.samples = 40
    for c in tally.counts:
        c[:] = rng.binomial(40, rng.beta(0.3, 1.5, size=len(c)))
    least = tally.threshold("expected-f1")
    half = tally.expected_f1(least) / 2
    shares = np.concatenate(tally.shares())
    assert (shares[shares >= least / 40] >= half).all()
    assert (shares[shares < least / 40] <= half).all()
    assert 0.05 < half < 0.5 and least < tally.threshold()


def test_the_state_round_trips_and_damage_is_refused():
    tally = _tally()
    again = BoundaryTally.from_state(tally.state(), [4, 2], "x.json")
    assert again.samples == 4 and [c.tolist() for c in again.counts] == [[3, 2, 0], [4]]
    good = tally.state()
    for bad, fragment in [
            ([], "samples and counts"),
            ({**good, "samples": -1}, "samples must be a count"),
            ({**good, "samples": True}, "samples must be a count"),
            ({**good, "counts": [[3, 2, 0]]}, "for 2 utterances"),
            ({**good, "counts": [[3, 2], [4]]}, "utterance 1: expected 3 counts"),
            ({**good, "counts": [[3, 2, 0], [5]]}, "utterance 2: expected 1 counts from 0 to 4"),
            ({**good, "counts": [[3, 2.0, 0], [4]]}, "utterance 1"),
    ]:
        with pytest.raises(InputError, match=f"x.json: boundary counts: .*{fragment}"):
            BoundaryTally.from_state(bad, [4, 2], "x.json")


def test_recorded_sweeps_end_at_the_last_and_stop_at_the_first():
    assert recorded_sweeps(60, 10, 2) == [42, 44, 46, 48, 50, 52, 54, 56, 58, 60]
    assert recorded_sweeps(6, 10, 2) == [2, 4, 6]
    assert recorded_sweeps(5, 3, 1) == [3, 4, 5]
    assert recorded_sweeps(5, 0, 2) == [] and recorded_sweeps(0, 10, 2) == []


def test_one_chain_recorded_once_gives_that_chains_segmentation():
    corpus = parse_utterances(["kelu mar ti", "mar kelu", "ti ti mar"])
    chars = [c for u in corpus.characters for c in u]
    sampler = AdaptorSampler(unigram_word_grammar(chars), corpus.characters, chains=2, seed=4)
    sampler.run(3)
    for chain in (0, 1):
        tally = BoundaryTally([len(u) for u in corpus.characters])
        alone = AdaptorSampler.from_state(sampler.state())
        alone.chains = [alone.chains[chain]]
        tally.record(alone, ["Word"])
        assert tally.samples == 1
        assert tally.segmentations(corpus.characters) == sampler.segmentations("Word", chain)
    with pytest.raises(ValueError, match="no symbol Stem"):
        BoundaryTally.of(sampler).record(sampler, ["Stem"])
    with pytest.raises(ValueError, match="not those of this tally"):
        BoundaryTally([3]).record(sampler, ["Word"])
