"""Raw text reading, the shared options and report, streaming, and bad input."""

from __future__ import annotations

import json
from collections import Counter

import pytest

from treewright.corpus import CorpusStream, ReadOptions, detect_format, read_corpus
from treewright.errors import InputError
from treewright.vocab import UNK

LINES = [
    "The Ferry left Port Ossel at 0915 .",
    "the ferry came back",
    "",
    "gulls 12 gulls 7 gulls",
    "a",
    "salt salt salt salt salt salt salt salt salt",
]


def write(tmp_path, lines, name="c.txt", ending="\n"):
    path = tmp_path / name
    path.write_bytes(ending.join(lines).encode("utf-8") + ending.encode())
    return path


def test_every_line_is_used_or_reported(tmp_path):
    path = write(tmp_path, LINES)
    corpus = read_corpus(path, options=ReadOptions(min_length=2, max_length=8))
    report = corpus.report
    assert report.fmt == "text"
    # Reference: the lines above, by hand: line 3 is blank, line 5 has one token, line 6 nine.
    assert [s.line for s in corpus.sentences] == [1, 2, 4]
    assert report.skipped_by_reason == {"empty": 1, "too_short": 1, "too_long": 1}
    assert [(r.reason, r.line) for r in report.skipped] == [
        ("empty", 3), ("too_short", 5), ("too_long", 6)]
    assert [s.line for s in corpus.set_aside] == [6]  # set aside, not dropped
    assert report.sentences_read == len(LINES)
    assert report.tokens == sum(len(LINES[i].split()) for i in (0, 1, 3))


def test_normalisation_and_vocabulary(tmp_path):
    path = write(tmp_path, LINES)
    options = ReadOptions(lowercase=True, normalize_digits=True, min_count=2)
    corpus = read_corpus(path, options=options)
    assert corpus.sentences[0].tokens == ["the", "ferry", "left", "port", "ossel", "at", "0000",
                                          "."]
    assert corpus.sentences[0].words[:2] == ["The", "Ferry"]  # words stay as written
    # Reference: a Counter over the same normalised tokens, filtered by hand.
    counts = Counter(t for s in corpus.sentences for t in s.tokens)
    kept = {w for w, c in counts.items() if c >= 2}
    assert set(corpus.vocabulary.words) == kept | {UNK}
    unknown = sum(c for w, c in counts.items() if w not in kept)
    assert corpus.report.unk_rate == pytest.approx(unknown / sum(counts.values()))
    assert corpus.report.vocab_size == len(kept) + 1
    ids = corpus.encode(corpus.sentences[0])
    assert [corpus.vocabulary.words[i] for i in ids] == [
        t if t in kept else UNK for t in corpus.sentences[0].tokens]

    capped = read_corpus(path, options=ReadOptions(max_vocab=3))
    # Vocabulary.from_counts keeps the most frequent max_vocab - 1 words, then UNK.
    assert capped.vocabulary.words == ["salt", "gulls", UNK]


def test_turkic_case_rules_lowercase_dotted_and_dotless_i(tmp_path):
    # Reference: Unicode's SpecialCasing.txt, the "tr" and "az" conditional mappings (from
    # memory): U+0049 I -> U+0131 dotless i, U+0130 dotted capital I -> U+0069 i. The default
    # (language-independent) mappings are I -> i and U+0130 -> i + U+0307 combining dot above.
    path = write(tmp_path, ["IŞIK İNCİ ile Ilık su"])
    turkic = read_corpus(path, options=ReadOptions(lowercase=True, case_rules="turkic"))
    assert turkic.sentences[0].tokens == ["\u0131\u015f\u0131k", "inci", "ile",
                                          "\u0131l\u0131k", "su"]
    plain = read_corpus(path, options=ReadOptions(lowercase=True))
    assert plain.sentences[0].tokens == ["i\u015fik", "i\u0307nci\u0307", "ile", "il\u0131k",
                                         "su"]
    with pytest.raises(ValueError, match="case_rules"):
        ReadOptions(case_rules="klingon").validate()


def test_given_vocabulary_gives_the_unknown_rate(tmp_path):
    train = read_corpus(write(tmp_path, ["a b c", "a b"], "train.txt"))
    test = read_corpus(write(tmp_path, ["a z", "z z b"], "test.txt"),
                       options=ReadOptions(vocabulary=train.vocabulary))
    assert test.vocabulary is train.vocabulary
    assert test.report.unk_rate == pytest.approx(3 / 5)  # hand count: three z of five tokens


def test_tag_mode_tokens_are_tags(tmp_path):
    path = write(tmp_path, ["DET NOUN VERB", "NOUN"])
    corpus = read_corpus(path, options=ReadOptions(tag_mode=True, lowercase=True))
    assert corpus.sentences[0].tokens == ["DET", "NOUN", "VERB"] == corpus.sentences[0].tags


def test_streaming_chunks_match_a_full_read(tmp_path):
    lines = [" ".join(["w%d" % (i % 7)] * (1 + i % 5)) for i in range(103)]
    path = write(tmp_path, lines)
    stream = CorpusStream(path, options=ReadOptions(max_length=4))
    chunks = list(stream.chunks(10))
    full = read_corpus(path, options=ReadOptions(max_length=4))
    assert all(len(c) <= 10 for c in chunks)
    assert [s.tokens for c in chunks for s in c] == [s.tokens for s in full.sentences]
    assert stream.report.sentences_used == full.report.sentences_used
    assert stream.report.skipped_by_reason == full.report.skipped_by_reason
    # Reference: lines with 5 tokens are those with i % 5 == 4.
    assert stream.report.skipped_by_reason == {"too_long": sum(i % 5 == 4 for i in range(103))}
    assert stream.count_tokens() == Counter(t for s in full.sentences for t in s.tokens)


def test_bom_and_mixed_line_endings(tmp_path):
    path = tmp_path / "mixed.txt"
    path.write_bytes("\ufeffone two\r\nthree\rfour five\nsix\r\n".encode("utf-8"))
    corpus = read_corpus(path)
    # Each of \r\n, \r and \n ends a line (as in Python's universal newlines).
    assert [s.words for s in corpus.sentences] == [["one", "two"], ["three"], ["four", "five"],
                                                   ["six"]]
    assert [s.line for s in corpus.sentences] == [1, 2, 3, 4]
    with open(path, encoding="utf-8-sig") as handle:  # the standard library's reading
        assert [line.split() for line in handle] == [s.words for s in corpus.sentences]


def test_report_format_and_dict(tmp_path):
    corpus = read_corpus(write(tmp_path, LINES), options=ReadOptions(max_length=8))
    data = corpus.report.to_dict()
    assert json.loads(json.dumps(data)) == data
    assert data["sentences_read"] == 6 and data["skipped_by_reason"] == {"empty": 1,
                                                                         "too_long": 1}
    text = corpus.report.format()
    assert "read 6 sentences" in text and "too_long 1" in text and "unknown-token rate" in text
    assert len(data["skipped"]) == 2 and "line 6" in data["skipped"][1]


def test_auto_detection(tmp_path):
    assert detect_format(write(tmp_path, ["  (S (N a))"], "a.txt")) == "brackets"
    assert detect_format(write(tmp_path, ["a b"], "b.txt")) == "text"
    assert detect_format(write(tmp_path, ["1\ta"], "c.conllu")) == "conllu"


def test_non_utf8_names_line_and_column(tmp_path):
    path = tmp_path / "latin1.txt"
    path.write_bytes(b"one\ncaf\xe9 two\nthree\n")
    with pytest.raises(InputError) as err:
        read_corpus(path)
    # Reference: byte 0xe9 is the fourth character of line 2.
    assert (err.value.line, err.value.column) == (2, 4)
    assert f"{path}, line 2, column 4" in str(err.value) and "UTF-8" in str(err.value)


def test_empty_file(tmp_path):
    path = tmp_path / "empty.txt"
    path.write_bytes(b"")
    with pytest.raises(InputError, match="empty") as err:
        read_corpus(path)
    assert err.value.path == str(path)


def test_missing_path(tmp_path):
    with pytest.raises(InputError, match="no such file") as err:
        read_corpus(tmp_path / "nowhere.txt")
    assert err.value.path == str(tmp_path / "nowhere.txt")
    with pytest.raises(InputError, match="folder"):
        read_corpus(tmp_path)


def test_no_usable_sentence_says_why(tmp_path):
    path = write(tmp_path, ["", "a b c d", "   "])
    with pytest.raises(InputError) as err:
        read_corpus(path, options=ReadOptions(max_length=3))
    message = str(err.value)
    assert message.startswith(str(path)) and "no usable sentence" in message
    # Every line is accounted for in the message: two blank, one too long.
    assert "3 read" in message and "2 empty" in message and "1 too_long" in message


def test_invalid_options_are_all_reported():
    with pytest.raises(ValueError) as err:
        ReadOptions(min_length=-1, min_count=0, nonprojective="drop").validate()
    assert str(err.value).count(";") == 2
