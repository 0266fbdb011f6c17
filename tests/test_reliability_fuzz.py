"""Property-based bad input over every reader: raw text, bracketed trees, CoNLL-U, grammar files
and training configs.

Inputs are a valid seed file mutated by hypothesis (bytes inserted, deleted, duplicated, or
replaced by characters each format gives meaning to), plus fully random bytes. The property
(the project's error contract, stated in treewright.errors): reading either succeeds or raises
InputError whose message starts with the file's name and, when it names a line, a line that
exists in the file. Any other exception fails the test, and so does an input that takes longer
than `HANG_SECONDS` (a SIGALRM timer per example). Each test prints how many inputs it tried.
"""

from __future__ import annotations

import signal
from contextlib import contextmanager

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from test_train_fixtures import VELMOR
from treewright.corpus import ReadOptions, read_corpus
from treewright.errors import InputError
from treewright.grammar import load_grammar, parse_grammar
from treewright.train import load_train_config

EXAMPLES = 300
HANG_SECONDS = 10
SETTINGS = settings(max_examples=EXAMPLES, deadline=None, database=None,
                    suppress_health_check=[HealthCheck.too_slow, HealthCheck.data_too_large])

# Pieces that each format reads as syntax, plus the usual troublemakers: control characters,
# line-ending variants, a byte-order mark, bytes that are not UTF-8, NaN and negative numbers.
PIECES = [b"(", b")", b"((", b"))", b"\t", b"\n", b"\r", b"\r\n", b"\x00", b"\x1b", b"\x0b",
          b"\xef\xbb\xbf", b"\xff", b"\xc3", b"\xe2\x82", b'"', b"\\", b"#", b"->", b"@start",
          b"@format 2", b"nan", b"-0.5", b"1e309", b"0", b"_", b"-", b"1-2", b"3.1", b":",
          b"!!python/object:os.system", b"&a", b"*a", b"{", b"}", b"[", b"- ", b"  "]

MUTATION = st.tuples(st.sampled_from(["insert", "delete", "replace", "duplicate"]),
                     st.integers(0, 4000), st.integers(0, 40),
                     st.one_of(st.sampled_from(PIECES), st.binary(max_size=6)))


def _mutate(seed: bytes, mutations) -> bytes:
    data = bytearray(seed)
    for op, at, length, piece in mutations:
        at = at % (len(data) + 1)
        if op == "insert":
            data[at:at] = piece
        elif op == "delete":
            del data[at:at + length]
        elif op == "replace":
            data[at:at + len(piece)] = piece
        else:
            data[at:at] = data[at:at + length]
    return bytes(data)


def _inputs(seed: bytes):
    return st.one_of(st.lists(MUTATION, min_size=1, max_size=8).map(lambda m: _mutate(seed, m)),
                     st.binary(max_size=300))


@contextmanager
def _no_hang():
    def expire(signum, frame):
        raise TimeoutError(f"reading took longer than {HANG_SECONDS} s")

    previous = signal.signal(signal.SIGALRM, expire)
    signal.alarm(HANG_SECONDS)
    try:
        yield
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, previous)


def _check_error(err: InputError, path, data: bytes) -> None:
    """The error contract: the message names the file, and a named line exists."""
    assert str(err).startswith(str(path)), str(err)
    assert err.reason, str(err)
    if err.line is not None:
        # Lines as an editor counts them: \n, \r\n and a lone \r each end a line.
        lines = data.replace(b"\r\n", b"\n").replace(b"\r", b"\n").count(b"\n") + 1
        assert 1 <= err.line <= lines, (err.line, lines, str(err))


def _run(tmp_path, name: str, seed: bytes, load) -> dict:
    """Run `load(path)` over generated variants of `seed`; returns the tally of outcomes."""
    path = tmp_path / name
    tally = {"tried": 0, "loaded": 0, "refused": 0}

    @SETTINGS
    @given(_inputs(seed))
    def check(data: bytes) -> None:
        path.write_bytes(data)
        tally["tried"] += 1
        with _no_hang():
            try:
                load(path)
            except InputError as err:
                tally["refused"] += 1
                _check_error(err, path, data)
                return
        tally["loaded"] += 1

    check()
    print(f"\n{name}: {tally['tried']} generated inputs, {tally['loaded']} loaded, "
          f"{tally['refused']} refused with InputError")
    return tally


TEXT_SEED = "ta ferro orun kip\nmo lanu sul\nkip dast ta vesk\n".encode()
BRACKET_SEED = ("(S (NP (D ta) (N ferro)) (VP sul))\n"
                "( (S (NP kip)\n   (VP (V orun) (NP kip))))\n").encode()
CONLLU_SEED = ("# sent_id = 1\n"
               "1\tta\tta\tDET\t_\t_\t2\tdet\t_\t_\n"
               "2\tferro\tferro\tNOUN\t_\t_\t3\tnsubj\t_\t_\n"
               "3-4\tsulna\t_\t_\t_\t_\t_\t_\t_\t_\n"
               "3\tsul\tsul\tVERB\t_\t_\t0\troot\t_\t_\n"
               "4\tna\tna\tPART\t_\t_\t3\tmark\t_\t_\n\n"
               "1\tkip\tkip\tPRON\t_\t_\t0\troot\t_\t_\n").encode()
CONFIG_SEED = ("data:\n  train: train.txt\n  max_length: 20\n"
               "model: {nonterminals: 3, preterminals: 4}\n"
               "train:\n  method: vb\n  epochs: 2\n  dtype: float64\n"
               "prior: {concentration: 0.5}\n").encode()


def _corpus(fmt: str):
    def load(path):
        for skip_bad in (False, True):
            read_corpus(path, fmt, ReadOptions(skip_bad=skip_bad, max_length=30))
    return load


def test_raw_text_reader(tmp_path):
    tally = _run(tmp_path, "text.txt", TEXT_SEED, _corpus("text"))
    assert tally["tried"] == EXAMPLES and tally["loaded"] > 0


def test_bracketed_tree_reader(tmp_path):
    tally = _run(tmp_path, "trees.txt", BRACKET_SEED, _corpus("brackets"))
    assert tally["tried"] == EXAMPLES and tally["loaded"] > 0 and tally["refused"] > 0


def test_conllu_reader(tmp_path):
    tally = _run(tmp_path, "words.conllu", CONLLU_SEED, _corpus("conllu"))
    assert tally["tried"] == EXAMPLES and tally["loaded"] > 0 and tally["refused"] > 0


def test_auto_detecting_reader(tmp_path):
    tally = _run(tmp_path, "mixed.txt", BRACKET_SEED + TEXT_SEED, _corpus("auto"))
    assert tally["tried"] == EXAMPLES


def test_hand_written_grammar_reader(tmp_path):
    tally = _run(tmp_path, "hand.pcfg", VELMOR.encode(), load_grammar)
    assert tally["tried"] == EXAMPLES and tally["refused"] > 0


def test_a_long_word_before_an_unclosed_quote_is_refused_at_once(tmp_path):
    # Found by the search above: the old well-formedness pattern tried every way of cutting a
    # run of characters before an unclosed quote (2^(run length) ways; minutes at 30).
    path = tmp_path / "hand.pcfg"
    path.write_text('S -> NP VP 1.0\nVP -> V N!!python/object:os.systemta" 0.5\n',
                    encoding="utf-8")
    with _no_hang(), pytest.raises(InputError, match="malformed rule") as err:
        load_grammar(path)
    assert err.value.line == 2


def test_saved_grammar_reader(tmp_path):
    # A saved (sealed) grammar: nearly every mutation must now be caught by the checksum line.
    # Whatever still loads must be the saved grammar itself (only blank lines or line endings
    # changed), never a silently edited one.
    original = parse_grammar(VELMOR).to_text()

    def load(path):
        assert load_grammar(path, renormalize=True).to_text() == original

    tally = _run(tmp_path, "saved.pcfg", original.encode(), load)
    assert tally["tried"] == EXAMPLES and tally["refused"] > 0


def test_training_config_reader(tmp_path):
    tally = _run(tmp_path, "run.yaml", CONFIG_SEED, lambda p: load_train_config(p))
    assert tally["tried"] == EXAMPLES and tally["loaded"] > 0 and tally["refused"] > 0
