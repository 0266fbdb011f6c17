"""End to end through the command line: a corpus word that is markup reaches the HTML report as
text, never as an element (the report escapes everything it takes from a corpus)."""

from __future__ import annotations

import subprocess
import sys
from html.parser import HTMLParser

HOSTILE = "<script>alert(1)</script>"


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)

    def handle_data(self, data):
        self.text.append(data)


def test_markup_in_the_corpus_is_text_in_the_report(tmp_path):
    words = ["sel", "varo", HOSTILE, "mek", "tunn"]
    lines = [" ".join(words[(k + j) % 5] for j in range(3 + k % 3)) for k in range(40)]
    (tmp_path / "train.txt").write_text("\n".join(lines) + "\n")
    gold = "(S (X sel) (Y (X " + HOSTILE.replace("(", "-LRB-").replace(")", "-RRB-") + ") (X mek)))"
    (tmp_path / "dev.trees").write_text(gold + "\n")
    config = tmp_path / "c.yaml"
    config.write_text(f"data:\n  train: {tmp_path / 'train.txt'}\n"
                      "model:\n  nonterminals: 3\n  preterminals: 4\n"
                      f"train:\n  epochs: 1\noutput:\n  run_dir: {tmp_path / 'run'}\n")
    run = [sys.executable, "-m", "treewright"]
    out = subprocess.run(run + ["train", str(config)], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    out = subprocess.run(run + ["report", str(tmp_path / "run"), "--gold",
                                str(tmp_path / "dev.trees")], capture_output=True, text=True)
    assert out.returncode == 0, out.stderr
    page = (tmp_path / "run" / "report.html").read_text(encoding="utf-8")
    parser = _Tags()
    parser.feed(page)
    assert "script" not in parser.tags
    assert any("alert" in t for t in parser.text)   # the word is shown, as text
