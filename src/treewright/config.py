"""Typed configuration: dataclass schemas, YAML files, dotted command-line overrides, validation.

A schema is a (possibly nested) dataclass whose fields carry their documentation and allowed
values as data beside them::

    @dataclass
    class TrainConfig:
        lr: float = option(0.01, "Step size of the optimizer.", range="(0, inf)")
        method: Literal["em", "vb"] = option("em", "Training method.")

    @dataclass
    class RunConfig:
        train: TrainConfig = option(TrainConfig(), "Training settings.")

    cfg = load_config(RunConfig, "run.yaml", ["train.lr=1e-3"])

Values are resolved in three layers, later layers winning: the dataclass defaults, the YAML file
(read with `yaml.safe_load` only), then `key=value` overrides whose values are read as YAML
scalars (`true`, `1e-3`, `[1, 2]`, `null`). The merged result is checked as a whole before any
work starts, and every problem (unknown key, wrong type, value out of range, missing value) is
reported in one `ConfigError`, each with its dotted key and the YAML line it came from.

With `resolve_paths=True` (as the training and refine configs load), a relative path written in
a config file is read relative to the file's folder, so a config works from any current folder;
a path given in an override (on the command line) or by default is relative to the current
folder, as command-line paths are. Every path comes out absolute, so a config saved in a run
folder loads back equal and finds its data from any folder.

Supported field types: bool, int, float, str, pathlib.Path, Literal[...], Optional[X] (X | None),
list[X] of those scalars, and nested dataclasses (also Optional). An int is accepted for a float
field; a bool is never accepted as a number, and a string never as a number.
"""

from __future__ import annotations

import copy
import dataclasses
import decimal
import difflib
import math
import os
import re
import types
import typing
from dataclasses import dataclass
from pathlib import Path, PurePath
from typing import Any, Literal, Sequence, TypeVar

import yaml

from treewright.errors import InputError

T = TypeVar("T")

_MISSING = dataclasses.MISSING
_STR_TAG = "tag:yaml.org,2002:str"

# PyYAML follows YAML 1.1, whose float pattern needs a dot, so an unquoted `1e-3` loads as the
# string "1e-3". YAML 1.2 (and every other config reader people know) reads it as a number, so a
# plain (unquoted) scalar matching the 1.2 pattern is taken as a float where a float is expected.
_YAML12_FLOAT = re.compile(r"[-+]?(\.[0-9]+|[0-9]+(\.[0-9]*)?)([eE][-+]?[0-9]+)?")


# ---------------------------------------------------------------------------------------------
# Declaring options


@dataclass(frozen=True)
class Interval:
    """Allowed numeric range of an option; None means unbounded on that side (open at
    infinity, so an infinite value is never allowed).

    Written as a pair `(lo, hi)` (both ends included) or in interval notation as a string:
    `"[0, 1]"`, `"(0, inf)"`, `"[1, 100)"`.
    """

    lo: float | None
    hi: float | None
    lo_open: bool = False
    hi_open: bool = False

    def __contains__(self, value: float) -> bool:
        # An unbounded side is open at infinity, so inf itself is outside every range. Written
        # with positive comparisons so that NaN, which compares false, is outside too.
        lo = -math.inf if self.lo is None else self.lo
        hi = math.inf if self.hi is None else self.hi
        above = value > lo if self.lo_open or self.lo is None else value >= lo
        below = value < hi if self.hi_open or self.hi is None else value <= hi
        return above and below

    def __str__(self) -> str:
        left = "(" if self.lo_open or self.lo is None else "["
        right = ")" if self.hi_open or self.hi is None else "]"
        lo = "-inf" if self.lo is None else _format_end(self.lo)
        hi = "inf" if self.hi is None else _format_end(self.hi)
        return f"{left}{lo}, {hi}{right}"


_INTERVAL_TEXT = re.compile(r"\s*([\[(])\s*([^,\s]+)\s*,\s*([^,\s]+)\s*([\])])\s*")


def parse_interval(spec: Any) -> Interval:
    """Turn a range declaration (an `Interval`, a `(lo, hi)` pair or interval text) into an
    `Interval`. Raises TypeError for a malformed declaration: that is a bug in the schema."""
    if isinstance(spec, Interval):
        return spec
    if isinstance(spec, str):
        match = _INTERVAL_TEXT.fullmatch(spec)
        if match is None:
            raise TypeError(f"range {spec!r} is not interval notation like '[0, 1]' or '(0, inf)'")
        left, lo_text, hi_text, right = match.groups()

        def end(text: str, infinite: tuple[str, ...]) -> float | None:
            if text in infinite:
                return None
            try:
                return float(text)
            except ValueError:
                raise TypeError(f"range {spec!r} has a bad end point {text!r}") from None

        return Interval(end(lo_text, ("-inf",)), end(hi_text, ("inf", "+inf")), left == "(",
                        right == ")")
    if isinstance(spec, tuple) and len(spec) == 2 and all(
            x is None or (isinstance(x, (int, float)) and not isinstance(x, bool)) for x in spec):
        return Interval(spec[0], spec[1])
    raise TypeError(f"range must be (lo, hi) or interval text like '(0, 1]', not {spec!r}")


def option(default: Any = _MISSING, doc: str = "", *, range: Any = None,
           choices: Sequence[Any] | None = None) -> Any:
    """A dataclass field with its documentation and allowed values kept as field metadata.

    default: the value when neither the file nor an override gives one; leave it out for a
        required option. Lists and dataclass instances are copied for each new config, so a
        mutable default is safe here.
    doc: one or two sentences for `describe_config`.
    range: allowed numbers (see `Interval`); for a list option it applies to each element.
    choices: allowed values when a Literal type does not fit.
    """
    metadata: dict[str, Any] = {"doc": doc}
    if range is not None:
        parse_interval(range)  # fail when the schema is defined, not when a user runs it
        metadata["range"] = range
    if choices is not None:
        metadata["choices"] = tuple(choices)
    if isinstance(default, (list, dict, set)) or dataclasses.is_dataclass(default):
        frozen_default = copy.deepcopy(default)
        return dataclasses.field(default_factory=lambda: copy.deepcopy(frozen_default),
                                 metadata=metadata)
    return dataclasses.field(default=default, metadata=metadata)


# ---------------------------------------------------------------------------------------------
# Errors


@dataclass(frozen=True)
class ConfigProblem:
    """One thing wrong with a config: its dotted key, what is wrong and where the value came
    from (`source` is the YAML file, an override such as "override 'train.lr=x'", or None for a
    schema default; `line` is 1-based and set for YAML values)."""

    key: str
    message: str
    source: str | None = None
    line: int | None = None

    def __str__(self) -> str:
        if self.source is None:
            where = "default value"
        elif self.line is not None:
            where = f"{self.source}, line {self.line}"
        else:
            where = self.source
        return f"{self.key or '(top level)'}: {self.message} ({where})"


class ConfigError(InputError):
    """Every problem found in a config, reported together. `problems` lists them in order."""

    def __init__(self, problems: Sequence[ConfigProblem], path: str | None = None):
        self.problems = list(problems)
        count = len(self.problems)
        header = f"config has {count} problem{'s' if count != 1 else ''}:"
        body = "".join(f"\n  - {problem}" for problem in self.problems)
        super().__init__(header + body, path=path)


# ---------------------------------------------------------------------------------------------
# Loading


def load_config(cls: type[T], path: str | Path | None = None,
                overrides: Sequence[str] = (), resolve_paths: bool = False) -> T:
    """Build a `cls` instance from its defaults, the YAML file at `path` (if any) and dotted
    `key=value` overrides (later ones win), checked as a whole. An override replaces the whole
    value at its key (`train={lr: 0.1}` replaces the file's train section; `train.lr=0.1`
    changes one option). With `resolve_paths`, every path option comes out absolute (see the
    module docstring).

    Raises ConfigError listing every problem, or InputError when the file cannot be read or is
    not YAML.
    """
    _require_dataclass_type(cls)
    collected = _Collected()
    collected.resolve_paths = resolve_paths
    raw: dict[str, Any] = {}
    source = None
    if path is not None:
        source = str(path)
        raw = _read_yaml_file(Path(path), collected)
    for text in overrides:
        _apply_override(raw, text, collected)
    return _finish(cls, raw, collected, source)


def config_from_dict(cls: type[T], data: dict[str, Any], source: str = "<dict>") -> T:
    """Build and check a `cls` instance from a plain dict (for example a config stored in a
    checkpoint by `config_to_dict`). Raises ConfigError listing every problem."""
    _require_dataclass_type(cls)
    collected = _Collected()
    if not isinstance(data, dict):
        raise ConfigError([ConfigProblem("", f"expected a mapping, got {_describe(data)}",
                                         source)])
    _note_origins(data, "", source, collected)
    return _finish(cls, data, collected, None)


def _finish(cls: type[T], raw: dict[str, Any], collected: "_Collected", path: str | None) -> T:
    # Problems already found while reading the layers (repeated keys, malformed overrides) are
    # reported together with those found in the merged values.
    result = _Builder(cls, collected).build(cls, raw, "", None)
    if collected.problems:
        raise ConfigError(collected.problems, path=path)
    return result


class _Collected:
    """What the readers learned about each dotted key: where its value came from, whether it
    was an unquoted YAML scalar, and the problems found so far."""

    def __init__(self) -> None:
        self.origins: dict[str, tuple[str | None, int | None]] = {}
        self.plain_strings: set[str] = set()
        self.problems: list[ConfigProblem] = []
        self.folders: dict[str, Path] = {}  # config file (an origin) -> its absolute folder
        self.resolve_paths = False

    def where(self, key: str) -> tuple[str | None, int | None]:
        # A list element or a child of a mapping given as one override takes its parent's origin.
        probe = key
        while probe:
            if probe in self.origins:
                return self.origins[probe]
            cut = max(probe.rfind("."), probe.rfind("["))
            probe = probe[:cut] if cut > 0 else ""
        return None, None

    def add(self, key: str, message: str) -> None:
        source, line = self.where(key)
        self.problems.append(ConfigProblem(key, message, source, line))

    def forget(self, key: str) -> None:
        """Drop what is known under `key` (it is being replaced by an override)."""
        def under(k: str) -> bool:
            return k == key or k.startswith(key + ".") or k.startswith(key + "[")

        for k in [k for k in self.origins if under(k)]:
            del self.origins[k]
        self.plain_strings = {k for k in self.plain_strings if not under(k)}


def _read_yaml_file(path: Path, collected: _Collected) -> dict[str, Any]:
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise InputError("config file not found", path=str(path)) from None
    except UnicodeDecodeError as err:
        raise InputError(f"config file is not UTF-8 text ({err.reason})", path=str(path)) from None
    except OSError as err:
        raise InputError(f"cannot read config file: {err.strerror}", path=str(path)) from None
    data, node = _parse_yaml(text, str(path))
    if data is None:
        return {}
    if not isinstance(data, dict):
        line = node.start_mark.line + 1 if node is not None else None
        raise InputError(f"a config file must be a mapping of keys to values, not "
                         f"{_describe(data)}", path=str(path), line=line)
    _walk_nodes(node, "", str(path), collected)
    collected.folders[str(path)] = path.absolute().parent
    return data


def _parse_yaml(text: str, source: str) -> tuple[Any, yaml.Node | None]:
    """Values via `yaml.safe_load` and the node tree (for line marks and quoting) via
    `yaml.compose` with the safe loader; composing builds no Python objects."""
    try:
        return yaml.safe_load(text), yaml.compose(text, Loader=yaml.SafeLoader)
    except yaml.YAMLError as err:
        mark = getattr(err, "problem_mark", None)
        reason = getattr(err, "problem", None) or str(err)
        raise InputError(f"not valid YAML: {reason}", path=source,
                         line=mark.line + 1 if mark is not None else None,
                         column=mark.column + 1 if mark is not None else None) from None


def _walk_nodes(node: yaml.Node | None, key: str, source: str, collected: _Collected) -> None:
    if isinstance(node, yaml.MappingNode):
        first_seen: dict[str, int] = {}
        for key_node, value_node in node.value:
            name = str(key_node.value)
            child = f"{key}.{name}" if key else name
            line = key_node.start_mark.line + 1
            if name in first_seen:
                # safe_load keeps the last of repeated keys without a word; say so instead.
                collected.problems.append(ConfigProblem(
                    child, f"key given twice (first on line {first_seen[name]}); only one "
                           f"value can be used", source, line))
            first_seen.setdefault(name, line)
            collected.origins[child] = (source, line)
            _walk_nodes(value_node, child, source, collected)
    elif isinstance(node, yaml.SequenceNode):
        for index, item in enumerate(node.value):
            child = f"{key}[{index}]"
            collected.origins[child] = (source, item.start_mark.line + 1)
            _walk_nodes(item, child, source, collected)
    elif isinstance(node, yaml.ScalarNode) and node.style is None and node.tag == _STR_TAG:
        collected.plain_strings.add(key)


def _note_origins(value: Any, key: str, source: str, collected: _Collected) -> None:
    if key:
        collected.origins[key] = (source, None)
    if isinstance(value, dict):
        for name, item in value.items():
            _note_origins(item, f"{key}.{name}" if key else str(name), source, collected)


_OVERRIDE_KEY = re.compile(r"[A-Za-z_][A-Za-z0-9_\-]*(\.[A-Za-z_][A-Za-z0-9_\-]*)*")


def _apply_override(raw: dict[str, Any], text: str, collected: _Collected) -> None:
    source = f"override {text!r}"
    key, sep, value_text = text.partition("=")
    key = key.strip()
    if not sep or not _OVERRIDE_KEY.fullmatch(key):
        collected.problems.append(ConfigProblem(
            key if sep else text, "an override must look like section.key=value", source))
        return
    try:
        value, node = _parse_yaml(value_text, source)
    except InputError as err:
        collected.problems.append(ConfigProblem(key, f"cannot read the value: {err.reason}",
                                                source))
        return
    parts = key.split(".")
    target = raw
    for depth, part in enumerate(parts[:-1]):
        section = ".".join(parts[: depth + 1])
        child = target.get(part)
        if child is None:
            child = target[part] = {}
            collected.origins.setdefault(section, (source, None))
        elif not isinstance(child, dict):
            collected.problems.append(ConfigProblem(
                key, f"'{section}' holds a single value, so it has no key '{parts[depth + 1]}'",
                source))
            return
        target = child
    collected.forget(key)
    target[parts[-1]] = value
    collected.origins[key] = (source, None)
    _walk_nodes(node, key, source, collected)


# ---------------------------------------------------------------------------------------------
# Checking values against the schema


class _Invalid:
    """Marks a value that failed a check (already reported)."""


_INVALID = _Invalid()


class _Builder:
    def __init__(self, root: type, collected: _Collected):
        self.collected = collected
        self.all_keys = list(_schema_keys(root, ""))

    def problem(self, key: str, message: str) -> _Invalid:
        self.collected.add(key, message)
        return _INVALID

    def build(self, cls: type, raw: dict[str, Any], prefix: str, base: Any) -> Any:
        """A `cls` instance from `raw` over `base` (an instance whose values stand in for keys
        missing from `raw`) or, without a base, over the field defaults."""
        hints = _hints(cls)
        fields = {f.name: f for f in dataclasses.fields(cls) if f.init}
        for name in raw:
            if name not in fields:
                self.problem(prefix + str(name), "unknown key" + _suggestion(
                    str(name), list(fields), prefix, self.all_keys))
        values: dict[str, Any] = {}
        for name, f in fields.items():
            key = prefix + name
            fallback = getattr(base, name) if base is not None else _field_default(f)
            if name in raw:
                value = raw[name]
            elif fallback is not _MISSING:
                value = fallback
            else:
                values[name] = self.problem(key, "required value is missing")
                continue
            values[name] = self.check(value, hints[name], key, f.metadata, fallback)
        if any(v is _INVALID for v in values.values()):
            return _INVALID
        return cls(**values)

    def check(self, value: Any, tp: Any, key: str, metadata: Any, fallback: Any = _MISSING) -> Any:
        inner, optional = _split_optional(tp)
        if value is None:
            return None if optional else self.problem(key, f"expected {_type_name(inner)}, "
                                                           f"got null")
        if dataclasses.is_dataclass(inner):
            if isinstance(value, inner):
                return self.build(inner, {}, key + ".", value)
            if isinstance(value, dict):
                base = fallback if isinstance(fallback, inner) else None
                return self.build(inner, value, key + ".", base)
            return self.problem(key, f"expected a section of keys, got {_describe(value)}")
        if typing.get_origin(inner) is list:
            if not isinstance(value, (list, tuple)):
                return self.problem(key, f"expected a list, got {_describe(value)}")
            (element_type,) = typing.get_args(inner) or (Any,)
            items = [self.scalar(item, element_type, f"{key}[{i}]", metadata)
                     for i, item in enumerate(value)]
            return _INVALID if any(v is _INVALID for v in items) else items
        return self.scalar(value, inner, key, metadata)

    def scalar(self, value: Any, tp: Any, key: str, metadata: Any) -> Any:
        if typing.get_origin(tp) is Literal:
            allowed = typing.get_args(tp)
            if any(value == c and type(value) is type(c) for c in allowed):
                return value
            return self.problem(key, f"{_show(value)} is not one of {_show_choices(allowed)}"
                                     + _choice_hint(value, allowed))
        if tp is bool:
            if not isinstance(value, bool):
                return self.problem(key, f"expected true or false, got {_describe(value)}")
        elif tp is int:
            if isinstance(value, bool) or not isinstance(value, int):
                return self.problem(key, f"expected an integer, got {_describe(value)}"
                                         + _quoted_hint(value, key in self.collected.plain_strings))
        elif tp is float:
            if (isinstance(value, str) and key in self.collected.plain_strings
                    and _YAML12_FLOAT.fullmatch(value)):
                value = float(value)
            if isinstance(value, bool) or not isinstance(value, (int, float)):
                return self.problem(key, f"expected a number, got {_describe(value)}"
                                         + _quoted_hint(value))
            try:
                value = float(value)
            except OverflowError:
                return self.problem(key, f"{value} is too large for a float")
        elif tp is str:
            if not isinstance(value, str):
                return self.problem(key, f"expected a string, got {_describe(value)}; put it in "
                                         f"quotes if it is meant as text")
        elif tp is Path:
            if not isinstance(value, (str, PurePath)) or str(value) == "":
                return self.problem(key, f"expected a file or folder path, got "
                                         f"{_describe(value)}")
            value = Path(value)
            if self.collected.resolve_paths:
                # A file's paths are relative to its folder; any other (override, default) to
                # the current folder. Absolute results make a saved config load back equal.
                folder = self.collected.folders.get(self.collected.where(key)[0], Path.cwd())
                value = Path(os.path.normpath(folder / value))
        else:
            raise TypeError(f"config option {key!r} has unsupported type {tp!r}")
        spec = metadata.get("range")
        if spec is not None and value not in parse_interval(spec):
            return self.problem(key, f"{_show(value)} is outside the allowed range "
                                     f"{parse_interval(spec)}")
        choices = metadata.get("choices")
        if choices is not None and value not in choices:
            return self.problem(key, f"{_show(value)} is not one of {_show_choices(choices)}"
                                     + _choice_hint(value, choices))
        return value


def _field_default(f: dataclasses.Field) -> Any:
    if f.default is not _MISSING:
        return f.default
    if f.default_factory is not _MISSING:
        return f.default_factory()
    return _MISSING


def _require_dataclass_type(cls: Any) -> None:
    if not (isinstance(cls, type) and dataclasses.is_dataclass(cls)):
        raise TypeError(f"a config schema must be a dataclass type, not {cls!r}")


def _hints(cls: type) -> dict[str, Any]:
    return typing.get_type_hints(cls)


def _split_optional(tp: Any) -> tuple[Any, bool]:
    """(X, True) for Optional[X] / X | None, (tp, False) otherwise."""
    if typing.get_origin(tp) in (typing.Union, types.UnionType):
        args = [a for a in typing.get_args(tp) if a is not type(None)]
        if len(args) != 1:
            raise TypeError(f"config options support only Optional[X] unions, not {tp!r}")
        return args[0], len(args) < len(typing.get_args(tp))
    return tp, False


def _suggestion(name: str, siblings: list[str], prefix: str, all_keys: list[str]) -> str:
    """A "did you mean" for an unknown key: a close sibling, or else the same (or a close) name
    in another section, which catches a right key put under the wrong section."""
    close = difflib.get_close_matches(name, siblings, n=1, cutoff=0.6)
    if close:
        return f"; did you mean '{prefix}{close[0]}'?"
    by_last_part: dict[str, str] = {}
    for key in all_keys:
        by_last_part.setdefault(key.rsplit(".", 1)[-1], key)
    close = difflib.get_close_matches(name, list(by_last_part), n=1, cutoff=0.8)
    return f"; did you mean '{by_last_part[close[0]]}'?" if close else ""


def _schema_keys(cls: type, prefix: str):
    """Every dotted key of schema `cls`, sections included."""
    hints = _hints(cls)
    for f in dataclasses.fields(cls):
        if f.init:
            yield prefix + f.name
            inner, _ = _split_optional(hints[f.name])
            if dataclasses.is_dataclass(inner):
                yield from _schema_keys(inner, prefix + f.name + ".")


def _choice_hint(value: Any, allowed: Sequence[Any]) -> str:
    if not isinstance(value, str):
        return ""
    close = difflib.get_close_matches(value, [c for c in allowed if isinstance(c, str)], n=1)
    return f"; did you mean {close[0]!r}?" if close else ""


def _quoted_hint(value: Any, plain: bool = False) -> str:
    """What to write instead of a string that reads as a number; `plain`: it was unquoted (an
    integer option given an exponent, `1e3`, as the float reading takes it)."""
    if isinstance(value, str):
        try:
            float(value)
        except ValueError:
            return ""
        if plain:
            exact = decimal.Decimal(value)   # exactly: 1e30 as a float is not 10**30
            if not exact.is_finite():
                return ""
            if exact == exact.to_integral_value():
                return f"; an integer is written without an exponent: {int(exact)}"
            return f"; {value} is {exact.normalize():f}, not an integer"
        return "; write numbers without quotes"
    return ""


# ---------------------------------------------------------------------------------------------
# Saving and describing


def config_to_dict(cfg: Any) -> dict[str, Any]:
    """The config as plain data (dicts, lists, str, int, float, bool, None; paths as strings),
    in field order, ready for YAML or JSON. `config_from_dict` / `load_config` read it back."""
    if not (dataclasses.is_dataclass(cfg) and not isinstance(cfg, type)):
        raise TypeError(f"expected a config dataclass instance, not {cfg!r}")
    return {f.name: _plain(getattr(cfg, f.name)) for f in dataclasses.fields(cfg) if f.init}


def _plain(value: Any) -> Any:
    if dataclasses.is_dataclass(value) and not isinstance(value, type):
        return config_to_dict(value)
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, PurePath):
        return str(value)
    return value


class _ConfigDumper(yaml.SafeDumper):
    """Safe dumper that writes lists of scalars on one line (`lengths: [10, 20]`) and sections
    as indented blocks, the way people write config files by hand."""


def _represent_list(dumper: yaml.SafeDumper, value: list) -> yaml.Node:
    flat = all(not isinstance(v, (list, dict)) for v in value)
    return dumper.represent_sequence("tag:yaml.org,2002:seq", value, flow_style=flat)


def _represent_str(dumper: yaml.SafeDumper, value: str) -> yaml.Node:
    # With allow_unicode, PyYAML writes YAML's extra line breaks (NEL, LS, PS) raw inside
    # single quotes, where reading folds them into spaces; double quotes escape them instead.
    style = '"' if any(c in value for c in "\x85\u2028\u2029") else None
    return dumper.represent_scalar(_STR_TAG, value, style=style)


_ConfigDumper.add_representer(list, _represent_list)
_ConfigDumper.add_representer(str, _represent_str)


def dump_config_yaml(cfg: Any, header: str | None = None) -> str:
    """The resolved config as YAML text (every option, in field order), optionally under a
    `# ` comment header. `load_config` reads it back to an equal config."""
    text = yaml.dump(config_to_dict(cfg), Dumper=_ConfigDumper, sort_keys=False,
                     default_flow_style=False, allow_unicode=True)
    if header:
        text = "".join(f"# {line}".rstrip() + "\n" for line in header.splitlines()) + text
    return text


def describe_config(cls: type) -> str:
    """Every option of schema `cls` as text: dotted key, type, default, allowed values, doc.

    Defaults are the effective ones: a section whose default instance sets a field shows that
    value, not the field's own default."""
    _require_dataclass_type(cls)
    lines: list[str] = []
    _describe_fields(cls, "", None, lines)
    return "\n".join(lines) + "\n"


def _describe_fields(cls: type, prefix: str, base: Any, lines: list[str]) -> None:
    hints = _hints(cls)
    for f in dataclasses.fields(cls):
        if not f.init:
            continue
        key = prefix + f.name
        doc = f.metadata.get("doc", "")
        default = getattr(base, f.name) if base is not None else _field_default(f)
        inner, _ = _split_optional(hints[f.name])
        if dataclasses.is_dataclass(inner):
            lines.append(f"{key}: (section) {doc}".rstrip())
            _describe_fields(inner, key + ".", default if isinstance(default, inner) else None,
                             lines)
            continue
        facts = [_type_name(hints[f.name]),
                 "required" if default is _MISSING else f"default {_show(_plain(default))}"]
        if "range" in f.metadata:
            facts.append(f"range {parse_interval(f.metadata['range'])}")
        if "choices" in f.metadata:
            facts.append(f"one of {_show_choices(f.metadata['choices'])}")
        lines.append(f"{key} ({', '.join(facts)})")
        if doc:
            lines.append(f"    {doc}")


def _type_name(tp: Any) -> str:
    inner, optional = _split_optional(tp)
    if typing.get_origin(inner) is Literal:
        name = f"one of {_show_choices(typing.get_args(inner))}"
    elif typing.get_origin(inner) is list:
        args = typing.get_args(inner)
        name = f"list of {_type_name(args[0])}" if args else "list"
    elif dataclasses.is_dataclass(inner):
        name = "section"
    else:
        name = {bool: "bool", int: "int", float: "float", str: "string",
                Path: "path"}.get(inner, getattr(inner, "__name__", str(inner)))
    return f"{name} or null" if optional else name


def _show(value: Any) -> str:
    """A value as a user would write it in YAML."""
    if value is None:
        return "null"
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return repr(value)
    if isinstance(value, list):
        return "[" + ", ".join(_show(v) for v in value) + "]"
    return str(value)


def _show_choices(choices: Sequence[Any]) -> str:
    return ", ".join(_show(c) for c in choices)


def _describe(value: Any) -> str:
    """A value and its kind, for "expected X, got Y" messages."""
    if isinstance(value, dict):
        return "a section of keys"
    kind = {bool: "a boolean", int: "an integer", float: "a number", str: "the string",
            list: "a list"}.get(type(value), f"a {type(value).__name__}")
    return f"{kind} {_show(value)}"


def _format_end(value: float) -> str:
    """A range end point: `0` rather than `0.0`, since ends are written as plain numbers."""
    if float(value).is_integer() and abs(value) < 1e16:
        return str(int(value))
    return repr(float(value))
