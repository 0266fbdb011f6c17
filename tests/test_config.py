"""Tests for treewright.config: layering, YAML scalars, validation, error reports, round trips.

The references are facts of the trade (marked "common practice"): later config layers win over
earlier ones, dotted keys name nested sections, YAML 1.2 reads `1e-3` as a number, and
a saved resolved config loads back to an equal config. Line numbers are checked against the
line where the key sits in the test's own YAML text, found by a plain text search.
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Literal, Optional, Union

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from treewright.config import (ConfigError, Interval, config_from_dict, config_to_dict,
                               describe_config, dump_config_yaml, load_config, option,
                               parse_interval)
from treewright.errors import InputError


@dataclass
class ModelSection:
    nonterminals: int = option(30, "Number of nonterminal symbols.", range=(1, None))
    preterminals: int = option(60, "Number of preterminal symbols.", range="[1, inf)")
    init_scale: float = option(0.5, "Spread of the random initial weights.", range=(0, 1))


@dataclass
class TrainSection:
    lr: float = option(0.01, "Step size of the optimizer.", range="(0, inf)")
    method: Literal["em", "vb"] = option("em", "Training method.")
    epochs: int = option(10, "Passes over the corpus.", range=(0, None))
    shuffle: bool = option(True, "Shuffle sentences each epoch.")
    lengths: list[int] = option([10, 20], "Length limits of the curriculum.", range=(1, None))
    decay: Optional[float] = option(None, "Learning-rate decay per epoch.", range="(0, 1]")
    solver: str = option("plain", "Inner solver.", choices=["plain", "damped"])


@dataclass
class DataSection:
    train: Path = option(Path("corpora/velmar-train.txt"), "Training corpus.")
    dev: Optional[Path] = option(None, "Development corpus.")


@dataclass
class RunSchema:
    # The section default overrides one field of ModelSection's own defaults.
    model: ModelSection = option(ModelSection(nonterminals=20), "Grammar size.")
    train: TrainSection = option(TrainSection(), "Training settings.")
    data: DataSection = option(DataSection(), "Corpora.")
    name: str = option("velmar", "Run name.")
    seed: int = option(7, "Random seed.")


def write(tmp_path: Path, text: str, name: str = "run.yaml") -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return path


def line_of(text: str, needle: str) -> int:
    """1-based line of the first line containing `needle` (independent of the YAML reader)."""
    return next(i for i, line in enumerate(text.splitlines(), 1) if needle in line)


def problems_by_key(err: ConfigError) -> dict[str, list]:
    found: dict[str, list] = {}
    for problem in err.problems:
        found.setdefault(problem.key, []).append(problem)
    return found


# --- layering -----------------------------------------------------------------------------


def test_no_file_no_overrides_gives_the_dataclass_defaults():
    # Reference: the dataclass's own constructor (common practice: defaults are the base layer).
    assert load_config(RunSchema) == RunSchema()
    assert load_config(RunSchema).model.nonterminals == 20


def test_yaml_over_defaults_and_overrides_over_yaml(tmp_path):
    # Common practice: defaults < file < command line; dotted keys name nested sections.
    path = write(tmp_path, "# Velmar grammar run\n# treewright train run.yaml\n"
                           "train:\n  lr: 0.5\n  epochs: 3\nseed: 11\n")
    cfg = load_config(RunSchema, path, ["train.lr=0.25", "model.nonterminals=40",
                                        "data.train=corpora/other.txt"])
    assert cfg.train.lr == 0.25          # override beats the file
    assert cfg.train.epochs == 3         # file beats the default
    assert cfg.seed == 11
    assert cfg.model.nonterminals == 40
    assert cfg.data.train == Path("corpora/other.txt")
    assert cfg.train.method == "em"      # untouched default


def test_later_override_of_the_same_key_wins():
    # Common practice: overrides apply in command-line order.
    assert load_config(RunSchema, None, ["seed=1", "seed=2"]).seed == 2


def test_section_default_instance_is_kept_for_keys_the_file_does_not_set(tmp_path):
    # RunSchema.model defaults to ModelSection(nonterminals=20); setting another key of the
    # section must not fall back to ModelSection's own default of 30.
    path = write(tmp_path, "model:\n  preterminals: 5\n")
    cfg = load_config(RunSchema, path)
    assert (cfg.model.nonterminals, cfg.model.preterminals) == (20, 5)


def test_override_values_are_read_as_yaml_scalars():
    # YAML 1.2 core schema (yaml.org/spec/1.2.2, 10.3.2): true is a bool, 1e-3 a float,
    # [1, 2] a sequence, null the null value.
    cfg = load_config(RunSchema, None, ["train.shuffle=false", "train.lr=1e-3",
                                        "train.lengths=[1, 2]", "train.decay=0.5",
                                        "data.dev=null", "name='123'"])
    assert cfg.train.shuffle is False
    assert cfg.train.lr == 0.001
    assert cfg.train.lengths == [1, 2]
    assert cfg.train.decay == 0.5
    assert cfg.data.dev is None
    assert cfg.name == "123"             # quoted, so it stays text


def test_unquoted_exponent_floats_in_a_file_are_numbers(tmp_path):
    # YAML 1.2 reads 1e-3 and 2E+1 as floats (PyYAML's 1.1 pattern would give strings).
    path = write(tmp_path, "train:\n  lr: 1e-3\n  decay: 2E-1\n")
    cfg = load_config(RunSchema, path)
    assert cfg.train.lr == 0.001
    assert cfg.train.decay == 0.2


def test_int_is_accepted_for_a_float_field_and_becomes_a_float():
    # Common practice: an integer is a valid real number; the stored value has type float.
    cfg = load_config(RunSchema, None, ["train.lr=2"])
    assert cfg.train.lr == 2.0 and type(cfg.train.lr) is float


def test_empty_file_and_header_only_file_give_defaults(tmp_path):
    assert load_config(RunSchema, write(tmp_path, "")) == RunSchema()
    assert load_config(RunSchema, write(tmp_path, "# only a header\n# cmd\n")) == RunSchema()


def test_mutable_defaults_are_not_shared_between_configs():
    # Common practice (the dataclass mutable-default pitfall): each config owns its lists.
    first, second = load_config(RunSchema), load_config(RunSchema)
    first.train.lengths.append(99)
    assert second.train.lengths == [10, 20]
    assert RunSchema().train.lengths == [10, 20]


# --- type and range checks ----------------------------------------------------------------


@pytest.mark.parametrize("override", [
    "train.epochs=true",     # bool is never an int
    "train.lr=false",        # ... nor a float
    "train.epochs=1.5",      # a float is not an int
    "train.epochs='3'",      # a string is never a number
    "train.lr='0.1'",
    "train.lr='1e-3'",       # quoted, so text even though it looks like a number
    "train.lr=fast",
    "train.shuffle=1",       # 1 is not a bool
    "name=12",               # a number is not text
    "data.train=null",       # not Optional
    "train.lengths=5",       # a scalar is not a list
    "model=3",               # a scalar is not a section
    "train.method=EM",       # Literal choices are exact
    "train.solver=fast",     # metadata choices
])
def test_wrong_types_are_refused(override):
    with pytest.raises(ConfigError) as info:
        load_config(RunSchema, None, [override])
    key = override.split("=")[0]
    assert [p.key for p in info.value.problems] == [key]
    assert info.value.problems[0].source == f"override {override!r}"


@pytest.mark.parametrize("override, accepted", [
    # Interval notation (common practice): [ ] include the end, ( ) exclude it.
    ("model.init_scale=0", True), ("model.init_scale=1", True), ("model.init_scale=1.01", False),
    ("model.init_scale=-0.0001", False), ("train.lr=0", False), ("train.lr=1e-300", True),
    ("train.decay=1", True), ("train.decay=0", False), ("model.nonterminals=1", True),
    ("model.nonterminals=0", False), ("train.lr=.nan", False), ("train.lr=.inf", False),
])
def test_ranges(override, accepted):
    if accepted:
        load_config(RunSchema, None, [override])
    else:
        with pytest.raises(ConfigError, match="outside the allowed range"):
            load_config(RunSchema, None, [override])


def test_interval_parsing_and_membership():
    # Interval notation: "(0, 1]" excludes 0 and includes 1; "inf" is unbounded.
    interval = parse_interval("(0, 1]")
    assert interval == Interval(0.0, 1.0, lo_open=True, hi_open=False)
    assert (0 in interval, 1 in interval, 0.5 in interval, math.nan in interval) == (
        False, True, True, False)
    assert parse_interval((2, None)) == Interval(2, None)
    assert (math.inf in parse_interval((2, None)), -math.inf in parse_interval((None, 2))) == (
        False, False)
    assert str(parse_interval("[1, inf)")) == "[1, inf)"
    with pytest.raises(TypeError):
        option(1, "bad range", range="0..1")


def test_list_elements_are_checked_one_by_one_with_their_index():
    with pytest.raises(ConfigError) as info:
        load_config(RunSchema, None, ["train.lengths=[3, 0, x, 4]"])
    assert [p.key for p in info.value.problems] == ["train.lengths[1]", "train.lengths[2]"]


def test_optional_accepts_null_and_a_value():
    assert load_config(RunSchema, None, ["train.decay=null"]).train.decay is None
    assert load_config(RunSchema, None, ["data.dev=dev.txt"]).data.dev == Path("dev.txt")


# --- unknown keys and the collected report ------------------------------------------------


def test_unknown_keys_get_did_you_mean_suggestions():
    with pytest.raises(ConfigError) as info:
        load_config(RunSchema, None, ["trian.lr=1", "model.nonterminls=3", "lr=3"])
    found = problems_by_key(info.value)
    assert "did you mean 'train'?" in found["trian"][0].message
    assert "did you mean 'model.nonterminals'?" in found["model.nonterminls"][0].message
    # A right name in the wrong section points to the section that has it.
    assert "did you mean 'train.lr'?" in found["lr"][0].message


def test_all_problems_are_reported_at_once_with_yaml_lines(tmp_path):
    text = ("# Velmar run with many mistakes\n"
            "model:\n"
            "  nonterminls: 3\n"
            "  init_scale: 2\n"
            "train:\n"
            "  lr: '0.1'\n"
            "  method: emm\n"
            "  epochs: true\n"
            "name: 12\n")
    path = write(tmp_path, text)
    with pytest.raises(ConfigError) as info:
        load_config(RunSchema, path, ["seed=x"])
    err = info.value
    expected_lines = {"model.nonterminls": line_of(text, "nonterminls"),
                      "model.init_scale": line_of(text, "init_scale"),
                      "train.lr": line_of(text, "lr:"),
                      "train.method": line_of(text, "method"),
                      "train.epochs": line_of(text, "epochs"),
                      "name": line_of(text, "name")}
    found = problems_by_key(err)
    assert set(found) == set(expected_lines) | {"seed"}
    for key, line in expected_lines.items():
        (problem,) = found[key]
        assert (problem.source, problem.line) == (str(path), line)
        # The message names every problem with its key and line.
        assert f"{key}: " in str(err) and f"line {line})" in str(err)
    assert found["seed"][0].line is None and "seed=x" in found["seed"][0].source
    assert "did you mean 'em'?" in found["train.method"][0].message
    assert str(err).startswith(f"{path}: config has 7 problems:")
    assert isinstance(err, InputError) and err.path == str(path)


def test_repeated_yaml_key_is_reported_not_silently_replaced(tmp_path):
    text = "seed: 1\nname: a\nseed: 2\n"
    with pytest.raises(ConfigError) as info:
        load_config(RunSchema, write(tmp_path, text))
    (problem,) = info.value.problems
    assert problem.key == "seed" and problem.line == 3 and "first on line 1" in problem.message


def test_missing_required_option_is_reported():
    @dataclass
    class NeedsCorpus:
        corpus: Path = option(doc="Training corpus (required).")
        size: int = option(3, "Size.")

    with pytest.raises(ConfigError) as info:
        load_config(NeedsCorpus, None, ["size=x"])
    assert [p.key for p in info.value.problems] == ["corpus", "size"]
    assert load_config(NeedsCorpus, None, ["corpus=a.txt"]).corpus == Path("a.txt")


@pytest.mark.parametrize("override", ["noequals", "=5", "a..b=1", "name.part=1"])
def test_malformed_overrides_are_reported(override):
    with pytest.raises(ConfigError) as info:
        load_config(RunSchema, None, [override])
    assert len(info.value.problems) == 1


def test_unreadable_files_raise_input_error_with_line(tmp_path):
    with pytest.raises(InputError, match="not found"):
        load_config(RunSchema, tmp_path / "absent.yaml")
    # The second line holds the stray colon; PyYAML marks it (0-based line 1 -> line 2).
    broken = write(tmp_path, "seed: 1\nname: a: b\n")
    with pytest.raises(InputError) as info:
        load_config(RunSchema, broken)
    assert info.value.line == 2 and info.value.path == str(broken)
    with pytest.raises(InputError, match="mapping of keys"):
        load_config(RunSchema, write(tmp_path, "- 1\n- 2\n"))


def test_schema_mistakes_are_type_errors():
    @dataclass
    class TwoTypes:
        value: Union[int, str] = 1

    @dataclass
    class OddType:
        value: complex = 1j

    with pytest.raises(TypeError):
        load_config(TwoTypes)
    with pytest.raises(TypeError):
        load_config(OddType)
    with pytest.raises(TypeError):
        load_config(dict)


# --- saving, round trips and description --------------------------------------------------


def test_config_to_dict_is_plain_json_data():
    cfg = load_config(RunSchema, None, ["data.dev=dev.txt"])
    data = config_to_dict(cfg)
    assert json.loads(json.dumps(data)) == data       # reference: the json module
    assert data["data"] == {"train": "corpora/velmar-train.txt", "dev": "dev.txt"}
    assert config_from_dict(RunSchema, data) == cfg


def test_dump_then_load_gives_an_equal_config(tmp_path):
    cfg = load_config(RunSchema, None, ["train.lr=1e-5", "train.decay=0.25", "name='true'",
                                        "train.lengths=[]", "data.dev=x y.txt"])
    text = dump_config_yaml(cfg, header="Resolved config of the Velmar run\ntreewright train")
    assert text.startswith("# Resolved config of the Velmar run\n# treewright train\n")
    assert load_config(RunSchema, write(tmp_path, text)) == cfg


@pytest.mark.parametrize("name", ["\x85", "a\u2028b", "harbour \u00e9\u2029", " ", "1e-3",
                                  "null", "line\nbreak", "\t"])
def test_awkward_strings_survive_the_dump(tmp_path, name):
    # YAML 1.1 treats NEL/LS/PS as line breaks and `null` as the null value; a saved text
    # option must still read back as exactly the same string (found by the property below).
    cfg = RunSchema(name=name)
    assert load_config(RunSchema, write(tmp_path, dump_config_yaml(cfg))).name == name


@settings(max_examples=60, deadline=None)
@given(lr=st.floats(min_value=1e-300, max_value=1e300),
       scale=st.floats(min_value=0, max_value=1),
       lengths=st.lists(st.integers(1, 10**12), max_size=4),
       name=st.text(max_size=12),
       epochs=st.integers(0, 10**18))
def test_round_trip_property(tmp_path_factory, lr, scale, lengths, name, epochs):
    # Reference: the config itself; saving the resolved config must lose nothing (common
    # practice: resolved configs are saved with runs and read back on resume).
    cfg = RunSchema(model=ModelSection(init_scale=scale),
                    train=TrainSection(lr=lr, lengths=lengths, epochs=epochs), name=name)
    path = tmp_path_factory.mktemp("rt") / "cfg.yaml"
    path.write_text(dump_config_yaml(cfg), encoding="utf-8")
    assert load_config(RunSchema, path) == cfg


def test_config_from_dict_reports_problems():
    with pytest.raises(ConfigError) as info:
        config_from_dict(RunSchema, {"seed": "x", "extra": 1}, source="checkpoint meta")
    assert {p.key for p in info.value.problems} == {"seed", "extra"}
    assert all(p.source == "checkpoint meta" for p in info.value.problems)


def _leaf_keys(cls, prefix=""):
    """Dotted keys of all non-section fields, walked with dataclasses.fields directly."""
    for f in dataclasses.fields(cls):
        sub = f.default_factory() if f.default_factory is not dataclasses.MISSING else f.default
        if dataclasses.is_dataclass(sub):
            yield from _leaf_keys(type(sub), prefix + f.name + ".")
        else:
            yield prefix + f.name


def test_describe_config_lists_every_option_with_type_default_and_doc():
    text = describe_config(RunSchema)
    lines = text.splitlines()
    for key in _leaf_keys(RunSchema):
        assert any(line.startswith(key + " (") for line in lines), key
    assert "model.nonterminals (int, default 20, range [1, inf))" in lines
    assert "train.lr (float, default 0.01, range (0, inf))" in lines
    assert "train.method (one of 'em', 'vb', default 'em')" in lines
    assert "data.dev (path or null, default null)" in lines
    index = lines.index("train.lr (float, default 0.01, range (0, inf))")
    assert lines[index + 1].strip() == "Step size of the optimizer."


def test_an_exponent_for_an_integer_option_is_answered_with_the_integer():
    # Hand-worked: 1e3 is 1000. Unquoted, it reads as a float (YAML 1.2), which an integer option
    # does not take; the message gives the integer to write. Quoted, it is text.
    with pytest.raises(ConfigError, match="an integer is written without an exponent: 1000"):
        load_config(RunSchema, None, ["seed=1e3"])
    with pytest.raises(ConfigError, match="write numbers without quotes"):
        load_config(RunSchema, None, ["seed='12'"])
    # Hand-worked: 1e-2 is 0.01, no integer; 1e30 is exactly 10**30 (not the float's
    # 1000000000000000019884624838656).
    with pytest.raises(ConfigError, match="1e-2 is 0.01, not an integer"):
        load_config(RunSchema, None, ["seed=1e-2"])
    with pytest.raises(ConfigError, match=f"without an exponent: {10 ** 30}[^0-9]"):
        load_config(RunSchema, None, ["seed=1e30"])
    with pytest.raises(ConfigError, match="expected an integer"):
        load_config(RunSchema, None, ["seed=inf"])
