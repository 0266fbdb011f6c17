"""The boundary-posterior segmentation of `adaptor.posterior`, by hand; its estimate against
the enumerated posterior is in tests/test_adaptor.py, and the run's use of it in
tests/test_adaptor_run.py."""

from __future__ import annotations

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
