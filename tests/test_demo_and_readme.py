"""The newcomer's path: `treewright demo` delivers every artifact it promises, and the README's
examples marked runnable run as written."""

from __future__ import annotations

import io
import json
import re
import subprocess
import sys
from pathlib import Path


ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _blocks(marker: str) -> list[str]:
    return re.findall(r"<!-- " + marker + r" -->\n```\w*\n(.*?)```", README, re.S)


def test_quick_demo_writes_every_artifact_and_each_loads(tmp_path):
    from treewright.corpus import read_corpus
    from treewright.demo import run_demo
    from treewright.export import load_grammar_json
    from treewright.grammar import load_grammar

    out = io.StringIO()
    result = run_demo(tmp_path / "demo", "quick", stream=out)
    text = out.getvalue()
    for k in range(1, 9):
        assert f"[{k}/8]" in text
    a = result.artifacts
    assert set(a) == {"grammar", "metrics", "test parses", "evaluation", "refined grammar",
                      "listing", "json", "report"}
    induced = load_grammar(a["grammar"])
    assert len(induced.nonterminals) == 10 and len(induced.preterminals) == 20
    refined = load_grammar(a["refined grammar"])
    assert any("\u00b7" in s for s in refined.symbols)  # NAME·k subcategories
    # The JSON export holds the same grammar: identical rule probabilities (exact round trip).
    back = load_grammar_json(a["json"])
    assert back.to_text() == induced.to_text()
    metrics = [json.loads(x) for x in a["metrics"].read_text().splitlines()]
    assert any("train/loglik_per_word" in m for m in metrics)
    parses = read_corpus(a["test parses"], "brackets")
    assert len(parses.sentences) == 200           # one tree per test sentence, none dropped
    scores = json.loads(a["evaluation"].read_text())
    assert "conventions" in scores
    assert a["listing"].read_text().strip()
    assert "<svg" in a["report"].read_text()
    # Run again into the same folder, as a newcomer repeating the Quick start does: the earlier
    # demo's runs (finished, with their checkpoints) are replaced, not refused.
    again = run_demo(tmp_path / "demo", "quick", stream=io.StringIO())
    assert load_grammar(again.artifacts["grammar"]).to_text() == induced.to_text()


def test_the_demo_leaves_a_run_folder_it_did_not_make_alone(tmp_path):
    import pytest

    from treewright.demo import run_demo
    from treewright.errors import InputError
    mine = tmp_path / "demo" / "train"
    mine.mkdir(parents=True)
    (mine / "config.yaml").write_text("# my own run\n", encoding="utf-8")
    with pytest.raises(InputError, match="not one the demo made"):
        run_demo(tmp_path / "demo", "quick", stream=io.StringIO())
    assert (mine / "config.yaml").read_text(encoding="utf-8") == "# my own run\n"


def test_readme_shell_examples_marked_runnable_run(tmp_path):
    blocks = _blocks("runnable")
    assert len(blocks) >= 2
    bin_dir = Path(sys.executable).parent
    for block in blocks:
        for line in block.strip().splitlines():
            line = re.sub(r"(^|\| )treewright ", r"\1" + str(bin_dir / "treewright") + " ", line)
            out = subprocess.run(line, shell=True, cwd=ROOT, capture_output=True, text=True)
            assert out.returncode == 0, (line, out.stderr)


def test_readme_python_example_runs(capsys, monkeypatch):
    (block,) = _blocks("runnable-python")
    monkeypatch.chdir(ROOT)
    exec(compile(block, "README.md", "exec"), {})
    lines = capsys.readouterr().out.splitlines()
    # Manning & Schuetze (1999, ch. 11), from memory: p = 0.0015876 for the first sentence.
    first = float(lines[0].split()[0])
    assert abs(first - (-6.44553)) < 1e-4


def test_readme_quick_start_has_exactly_two_commands_and_ci_runs_the_test_one():
    quick = README.split("## Quick start", 1)[1].split("\n## ", 1)[0]
    commands = [line for line in re.findall(r"```bash\n(.*?)```", quick, re.S)]
    commands = [[x for x in c.splitlines() if x and not x.startswith("#")] for c in commands]
    assert [len(c) for c in commands] == [1, 1]
    ci = (ROOT / ".ci" / "run").read_text()
    assert commands[1][0] in ci
    assert "treewright demo" in commands[0][0]


def test_readme_data_examples_load(tmp_path):
    # The three five-line examples of "Using your own data", in order: raw text, bracketed
    # trees, CoNLL-U; each must load through the one documented reader. Then the head list
    # of the lexicalized model, through its reader.
    from treewright.corpus import read_corpus
    from treewright.train.data import read_head_list

    section = README.split("## Using your own data", 1)[1].split("\n## ", 1)[0]
    blocks = re.findall(r"```text\n(.*?)```", section, re.S)
    assert len(blocks) == 4
    (tmp_path / "heads.txt").write_text(blocks[3], encoding="utf-8")
    assert read_head_list(tmp_path / "heads.txt", lowercase=False) == [
        ("ko", -2.0), ("vo", -2.0), ("dorvik", 1.0)]
    expected = {"example.txt": 5, "example.trees": 3, "example.conllu": 1}
    for block, (name, count) in zip(blocks[:3], expected.items()):
        path = tmp_path / name
        path.write_text(block, encoding="utf-8")
        corpus = read_corpus(path)
        assert len(corpus.sentences) == count, name
        assert corpus.report.sentences_read == count
    trees = read_corpus(tmp_path / "example.trees").sentences
    # Function tags and the unlabeled root wrapper are handled (common practice).
    assert trees[1].tree.label == "S" and trees[1].tree.children[0].label == "NP"
