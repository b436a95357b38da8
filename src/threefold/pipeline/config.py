"""Experiment configs in TOML: one vocabulary with the Python API, validated on load.

A config names the data, how the tensor is built, the feedback weighting, the
split, the evaluation and the models to train (see ``docs/experiments.md``)::

    [data]
    events = "../data_samples/quillfen-courier/events.parquet"
    timezone = "Europe/Berlin"

    [weighting]
    alpha = 10.0
    w_skip = 2.0

    [models.cp]
    method = "cp"
    rank = 16

Every key is the name of the Python parameter it sets (``alpha`` is
``FeedbackWeighting(alpha=...)``, ``rank`` is ``CPModel(rank=...)``), so code,
configs and the command line share one vocabulary. Loading rejects an unknown
key with the closest valid name, and a value out of range with the key, the
allowed range and the value. Defaults are filled in, so a logged config holds
every setting that produced a run, even if a later version changes a default.
"""

from __future__ import annotations

import copy
import dataclasses
import difflib
import hashlib
import json
import math
import os
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Mapping, Sequence

from threefold.core.checks import check_choice
from threefold.core.feedback import FeedbackWeighting
from threefold.core.params import (BOOLEAN, STRING, STRINGS, Rule, choice_rule, float_rule, int_rule, list_rule,
                                    type_rule)
from threefold.core.defaults import SUSPICIOUS_CODES
from threefold.data.timestamps import duration_rule, instant_rule
from threefold.evaluation.harness import ACCURACY_METRICS, EvaluationOptions
from threefold.models.registry import MODELS, param_table

__all__ = ["ConfigError", "ExperimentConfig", "load_config", "parse_config", "parse_overrides", "to_toml",
           "model_defaults", "evaluation_options"]


class ConfigError(ValueError):
    """An experiment config is malformed, has an unknown key or a value out of range."""


# ---------------------------------------------------------------------- value rules
_int, _float, _choice, _type, _list = int_rule, float_rule, choice_rule, type_rule, list_rule


def _timezone(key, value, owner):
    from threefold.data.context import Daypart

    STRING(key, value, owner)
    Daypart(timezone=value)
    return value


def _metric(key, value, owner):
    # ndcg_true: NDCG against the true relevance, reported on simulated sites only
    return check_choice(key, value, tuple(ACCURACY_METRICS) + ("ndcg_true",), owner=owner)


_STR, _BOOL, _STR_LIST = STRING, BOOLEAN, STRINGS
_SEED = int_rule(low=0)
_DTYPE = choice_rule("float32", "float64")
_duration, _instant = duration_rule, instant_rule


def model_defaults(method: str) -> dict:
    """Configurable parameters of a method and their defaults (lists for tuples), from its parameter table."""
    defaults = param_table(method).defaults(configurable_only=True)
    return {k: list(v) if isinstance(v, tuple) else v for k, v in defaults.items()}


def _model_rule(method: str, key: str) -> Rule:
    return param_table(method)[key].config_rule


_WEIGHTING_RULES: dict[str, Rule] = {
    "alpha": _float(low=0.0), "transform": _choice("log1p", "linear", "none"), "signal": _choice("clicks", "dwell"),
    "w_skip": _float(low=0.0), "w0": _float(low=0.0), "w0_scope": _choice("cell", "pair"), "half_life_hours": _float(low=0.0, low_open=True),
    "reference_time": _int(low=0),
}

_EVAL = EvaluationOptions()  # the evaluation defaults live there

#: Section -> key -> (rule, default). A default of ``...`` marks a required key; None an optional one.
_SECTIONS: dict[str, dict[str, tuple[Rule, object]]] = {
    "experiment": {"name": (_STR, "threefold"), "tags": (None, {})},
    "data": {"events": (_STR, ...), "items": (_STR, None), "timezone": (_timezone, "UTC"),
             "errors": (_choice("raise", "drop"), "raise"), "drop_activity_outliers": (_BOOL, False),
             "allow": (_list(_choice(*SUSPICIOUS_CODES), "problem codes"), []),
             "hash_user_ids_salt": (_STR, None)},
    "build": {"contexts": (_STR_LIST, []),
              "daypart_starts": (_list(_float(low=0.0, high=24.0), "hours", min_len=1), [5.0, 9.0, 12.0, 17.0, 21.0]),
              "daypart_labels": (_list(_STR, "strings", min_len=1), ["early", "morning", "afternoon", "evening", "night"]),
              "negatives": (_choice("skip_above", "all_exposures", "none"), "skip_above"),
              "position_propensity": (_BOOL, False), "propensity_clip": (_float(low=1.0), 10.0),
              "drop_duplicates": (_BOOL, True), "dtype": (_DTYPE, "float32")},
    "weighting": {key: (rule, getattr(FeedbackWeighting(), key)) for key, rule in _WEIGHTING_RULES.items()},
    "split": {"cutoff": (_instant, ...), "validation_window": (_duration, None), "test_window": (_duration, None)},
    "evaluation": {"stage": (_choice("validation", "test"), _EVAL.stage),
                   "ks": (_list(_int(low=1), "ints", 1), list(_EVAL.ks)),
                   "baseline": (_STR, _EVAL.baseline), "candidates": (_choice("eligible", "shown"), _EVAL.candidates),
                   "metrics": (_list(_metric, "metric names", 1), ["recall", "ndcg"]),
                   "protocol": (_choice("rolling", "static"), _EVAL.protocol), "step": (_duration, _EVAL.step),
                   "n_resamples": (_int(low=1), _EVAL.n_resamples), "random_state": (_SEED, _EVAL.random_state),
                   "propensity_clip": (_float(low=1.0), _EVAL.propensity_clip),
                   "sensitivity_users": (_int(low=1), _EVAL.sensitivity_users), "aspect": (_STR, _EVAL.aspect),
                   "policy_ablation": (_BOOL, _EVAL.policy_ablation)},
    "select": {"context_ranks": (_list(_int(low=1), "ints", 1), [4, 8]), "metric": (_metric, "ndcg"),
               "k": (_int(low=1), 10), "candidates": (_choice("eligible", "shown"), "shown")},
    "sweep": {"model": (_STR, None), "search": (_choice("grid", "random"), "grid"), "n_trials": (_int(low=1), None),
              "metric": (_metric, "ndcg"), "k": (_int(low=1), 10), "random_state": (_SEED, 0), "space": (None, {})},
}
_REQUIRED_SECTIONS = ("data", "split", "models")
#: ``structure = "auto"`` in a CP model table: chosen on the validation window (threefold.pipeline.select).
AUTO = "auto"


# ---------------------------------------------------------------------- the config
@dataclass(frozen=True)
class ExperimentConfig:
    """A validated experiment config with every default filled in.

    Attributes
    ----------
    sections : dict
        ``{"data": {...}, "build": {...}, "weighting": {...}, "split": {...},
        "evaluation": {...}, "models": {name: {"method": ..., **params}},
        "sweep": {...}, "experiment": {...}}``; paths absolute.
    source : str
        Where it was read from (for messages).
    """

    sections: dict
    source: str = "<config>"

    def __getitem__(self, section: str) -> dict:
        return self.sections[section]

    @property
    def models(self) -> dict[str, dict]:
        """Model name -> its table (``method`` and parameters)."""
        return self.sections["models"]

    def weighting(self) -> FeedbackWeighting:
        """The :class:`FeedbackWeighting` of the ``[weighting]`` section."""
        return FeedbackWeighting(**self.sections["weighting"])

    def policies(self):
        """The :class:`~threefold.ranking.policy_spec.ListPolicies` of the ``[policies]`` table, or None."""
        from threefold.ranking.policy_spec import read_policies

        raw = self.sections.get("policies")
        return None if raw is None else read_policies(raw, name=f"{self.source}: [policies]")

    def contexts(self) -> list:
        """The context specifications of ``[build] contexts``."""
        from threefold.data.context import parse_context

        build = self.sections["build"]
        return [parse_context(name, timezone=self.sections["data"]["timezone"],
                              daypart_starts=build["daypart_starts"], daypart_labels=build["daypart_labels"])
                for name in build["contexts"]]

    def with_overrides(self, overrides: Mapping[str, object]) -> "ExperimentConfig":
        """A new config with dotted keys set (``{"models.cp.rank": 8}``), validated again."""
        raw = copy.deepcopy(self.sections)
        for dotted, value in overrides.items():
            _set_dotted(raw, dotted, value, self.source)
        return parse_config(raw, source=self.source)

    def flat(self, *, exclude: Sequence[str] = ("sweep",)) -> dict[str, object]:
        """Dotted keys to values (``"weighting.alpha": 10.0``), the form logged as run params."""
        out: dict[str, object] = {}

        def walk(prefix: str, value) -> None:
            if isinstance(value, dict) and value:
                for key in sorted(value):
                    walk(f"{prefix}.{key}" if prefix else key, value[key])
            else:
                out[prefix] = value

        walk("", {k: v for k, v in self.sections.items() if k not in exclude})
        return out

    def fingerprint(self, *, exclude: Sequence[str] = ("sweep", "experiment")) -> str:
        """SHA-256 of the canonical JSON of the settings that determine a result."""
        text = json.dumps({k: v for k, v in self.sections.items() if k not in exclude}, sort_keys=True, default=str)
        return hashlib.sha256(text.encode()).hexdigest()

    def to_toml(self) -> str:
        """The config as TOML text (loading it gives an equal config)."""
        return to_toml(self.sections)


def evaluation_options(config: ExperimentConfig, **overrides) -> EvaluationOptions:
    """The :class:`~threefold.evaluation.harness.EvaluationOptions` of a config's ``[evaluation]``.

    The list lengths include the sweep's ``k`` so that selection can read it.
    """
    ev = config["evaluation"]
    settings = {key: value for key, value in ev.items() if key not in ("ks", "metrics")}
    settings["ks"] = tuple(sorted(set(ev["ks"]) | {config["sweep"]["k"]}))
    return EvaluationOptions(**{**settings, **overrides})


def load_config(path: str | os.PathLike, overrides: Mapping[str, object] | None = None) -> ExperimentConfig:
    """Read, override and validate a TOML experiment config.

    Parameters
    ----------
    path : path
        The TOML file; relative data paths are read from its folder.
    overrides : mapping of str to value, optional
        Dotted keys set before validation (see :func:`parse_overrides`).

    Raises
    ------
    ConfigError
        Naming the file, the section and the key.
    """
    path = Path(path)
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise FileNotFoundError(f"No experiment config at {path}.") from None
    except tomllib.TOMLDecodeError as error:
        raise ConfigError(f"{path}: not valid TOML: {error}.") from None
    for dotted, value in (overrides or {}).items():
        _set_dotted(raw, dotted, value, str(path))
    return parse_config(raw, source=str(path), base=path.resolve().parent)


#: The value of an override that removes its key (``--unset models.cp.structure``).
UNSET = object()


def parse_overrides(items: Sequence[str], unset: Sequence[str] = ()) -> dict[str, object]:
    """``["models.cp.rank=8", "data.timezone=UTC"]`` -> dotted keys to values.

    A value is read as a TOML value (``8``, ``0.5``, ``true``, ``["daypart"]``,
    ``"text"``); anything that is not valid TOML is taken as a string. Each key
    of ``unset`` (``"models.cp.structure"``) is removed from the config, so its
    default applies (switching a model's method with ``--set`` leaves keys the
    new method may not take: remove them this way).
    """
    out: dict[str, object] = {}
    for key in unset:
        if "." not in key or not all(key.split(".")):
            raise ConfigError(f"--unset {key!r}: write section.key, e.g. --unset models.cp.structure.")
        out[key.strip()] = UNSET
    for item in items:
        key, sep, text = item.partition("=")
        if not sep or not key.strip() or "." not in key:
            raise ConfigError(f"--set {item!r}: write section.key=value, e.g. --set weighting.alpha=5.")
        try:
            value = tomllib.loads(f"v = {text.strip()}")["v"]
        except tomllib.TOMLDecodeError:
            value = text.strip()
        out[key.strip()] = value
    return out


def parse_config(raw: Mapping, *, source: str = "<config>", base: Path | None = None) -> ExperimentConfig:
    """Validate a config given as a nested dict (as read from TOML); see :func:`load_config`."""
    raw = copy.deepcopy(dict(raw))
    _reject_unknown(raw.keys(), list(_SECTIONS) + ["models", "policies"], "the config", source)
    for section in _REQUIRED_SECTIONS:
        if section not in raw:
            raise ConfigError(f"{source}: the config needs a [{section}] section.")
    out: dict = {}
    for section, rules in _SECTIONS.items():
        table = raw.get(section, {})
        if not isinstance(table, dict):
            raise ConfigError(f"{source}: [{section}] must be a table, got {table!r}.")
        out[section] = _check_table(table, rules, f"[{section}]", source)
    for key in ("events", "items"):
        if out["data"].get(key) is not None and base is not None:
            out["data"][key] = str((base / out["data"][key]).resolve()) if not os.path.isabs(out["data"][key]) else out["data"][key]
    if not isinstance(out["experiment"]["tags"], dict):
        raise ConfigError(f"{source}: [experiment] tags must be a table of strings.")
    out["experiment"]["tags"] = {str(k): str(v) for k, v in out["experiment"]["tags"].items()}
    _check_cross_section(out, source)
    out["models"] = _check_models(raw["models"], source)
    if "policies" in raw:  # the rules' own syntax is checked now; their columns once the catalog is read
        from threefold.ranking.policy_spec import PolicyError, read_policies

        if not isinstance(raw["policies"], dict):
            raise ConfigError(f"{source}: [policies] must be a table (docs/policies.md), got {raw['policies']!r}.")
        try:
            read_policies(raw["policies"], name=f"{source}: [policies]")
        except PolicyError as error:
            raise ConfigError(str(error)) from None
        out["policies"] = raw["policies"]
    evaluation, sweep = out["evaluation"], out["sweep"]
    if evaluation["baseline"] is not None and evaluation["baseline"] not in out["models"]:
        raise ConfigError(f"{source}: [evaluation] baseline {evaluation['baseline']!r} is not a model; "
                          f"models are {sorted(out['models'])}.")
    sweep["space"] = _check_space(sweep["space"], out, source)
    _check_models_against_modes(out, source)
    auto = [name for name, spec in out["models"].items() if spec["method"] == "cp" and spec.get("structure") == AUTO]
    if auto and out["split"]["validation_window"] is None:
        raise ConfigError(f"{source}: [models.{auto[0]}] structure = \"auto\" is chosen on the validation window; "
                          "set [split] validation_window (e.g. \"48h\": the longer the window, the more "
                          "requests the paired test has to find a gain).")
    if sweep["model"] is not None and sweep["model"] not in out["models"]:
        raise ConfigError(f"{source}: [sweep] model {sweep['model']!r} is not a model; models are {sorted(out['models'])}.")
    return ExperimentConfig(sections=out, source=source)


# ---------------------------------------------------------------------- validation helpers
def _reject_unknown(keys, valid: Sequence[str], where: str, source: str) -> None:
    for key in keys:
        if key not in valid:
            close = difflib.get_close_matches(str(key), list(valid), n=1, cutoff=0.5)
            hint = f"; did you mean {close[0]!r}?" if close else "."
            raise ConfigError(f"{source}: unknown key {key!r} in {where}{hint} Valid keys: {', '.join(sorted(valid))}.")


def _check_table(table: dict, rules: Mapping[str, tuple[Rule, object]], owner: str, source: str) -> dict:
    _reject_unknown(table.keys(), list(rules), owner, source)
    out = {}
    for key, (rule, default) in rules.items():
        if table.get(key) is None:  # absent, or None as in a filled-in config
            if default is ...:
                raise ConfigError(f"{source}: {owner} needs the key {key!r}.")
            out[key] = copy.deepcopy(default)
            continue
        out[key] = _apply(rule, key, table[key], owner, source)
    return out


def _apply(rule: Rule | None, key: str, value, owner: str, source: str):
    if rule is None:
        return value
    try:
        return rule(key, value, owner)
    except (ValueError, KeyError) as error:
        raise ConfigError(f"{source}: {error.args[0] if error.args else error}") from None


def _check_cross_section(out: dict, source: str) -> None:
    build = out["build"]
    if len(build["daypart_starts"]) != len(build["daypart_labels"]):
        raise ConfigError(f"{source}: [build] needs one daypart label per start hour; got "
                          f"{len(build['daypart_starts'])} starts and {len(build['daypart_labels'])} labels.")
    try:
        FeedbackWeighting(**out["weighting"])
        ExperimentConfig(out, source).contexts()
    except (ValueError, KeyError) as error:
        raise ConfigError(f"{source}: {error.args[0] if error.args else error}") from None


def _check_models(models, source: str) -> dict:
    if not isinstance(models, dict) or not models:
        raise ConfigError(f"{source}: [models] must hold at least one model table, e.g. [models.cp] method = \"cp\".")
    out = {}
    for name, table in models.items():
        owner = f"[models.{name}]"
        if not isinstance(table, dict):
            raise ConfigError(f"{source}: {owner} must be a table, got {table!r}.")
        method = _apply(_choice(*MODELS), "method", table.get("method", "cp"), owner, source)
        defaults = model_defaults(method)
        rules = {key: (_model_rule(method, key), default) for key, default in defaults.items()}
        params = _check_table({k: v for k, v in table.items() if k != "method"}, rules, owner, source)
        out[name] = {"method": method, **params}
    return out


def _mode_names(out: dict) -> tuple[str, ...]:
    """The tensor's mode names as the config will build them: user, item, then each context."""
    from threefold.data.context import spec_name

    return ("user", "item", *(spec_name(s) for s in ExperimentConfig(out, "").contexts()))


def _check_model_modes(name: str, spec: Mapping, modes: tuple[str, ...], source: str, where: str = "") -> None:
    """What a model table says about modes, checked against the tensor's modes before any data is read."""
    from threefold.models.cp.structure import Structure

    owner = f"[models.{name}]{where}"
    method = spec["method"]
    try:
        if method == "cp" and spec.get("structure") not in (None, AUTO):
            Structure.parse(spec["structure"], rank=spec["rank"]).check_modes(modes)
        for mode in spec.get("fixed_modes") or ():
            if mode not in modes:
                raise ValueError(f"fixed_modes names the mode {mode!r}, but the tensor's modes are {modes}.")
        if method in ("hooi", "implicit_tucker") and isinstance(spec["rank"], list) and len(spec["rank"]) != len(modes):
            raise ValueError(f"rank lists {len(spec['rank'])} sizes, but the tensor has {len(modes)} modes {modes} "
                             "(one size per mode, or one int for all).")
        for mode in spec.get("context_modes") or ():
            if mode not in modes[2:]:
                raise ValueError(f"context_modes names {mode!r}, but the context modes of [build] are {modes[2:]}.")
    except ValueError as error:
        raise ConfigError(f"{source}: {owner}: {error.args[0]}") from None


def _check_models_against_modes(out: dict, source: str) -> None:
    """Every structure term, rank list, fixed or context mode of every model, and of every sweep value."""
    modes = _mode_names(out)
    for name, spec in out["models"].items():
        _check_model_modes(name, spec, modes, source)
    for path, leaf in out["sweep"]["space"].items():
        parts = path.split(".")
        if parts[0] != "models":
            continue
        values = leaf if isinstance(leaf, list) else [leaf["low"], leaf["high"]]
        for value in values:
            spec = {**out["models"][parts[1]], parts[2]: value}
            _check_model_modes(parts[1], spec, modes, source, where=f" with [sweep.space] {parts[2]} = {value!r}")


def _check_space(space, out: dict, source: str) -> dict:
    """Validate ``[sweep.space]``: dotted paths of config keys, each a list of choices or a range table.

    Written nested (``[sweep.space.models.cp] rank = [8, 16]``) or with quoted
    dotted keys (``"models.cp.rank" = [8, 16]``); returned flat by dotted path.
    """
    if not isinstance(space, dict):
        raise ConfigError(f"{source}: [sweep.space] must be a table.")
    leaves: dict[str, object] = {}

    def flatten(table: dict, prefix: str) -> None:
        for key, value in table.items():
            path = f"{prefix}.{key}" if prefix else str(key)
            if isinstance(value, dict) and not (value and set(value) <= {"low", "high", "log"}):
                flatten(value, path)
            else:
                leaves[path] = value

    flatten(space, "")
    checked = {}
    for path, value in leaves.items():
        parts = path.split(".")
        owner = f"[sweep.space] {path!r}"
        _reject_unknown([parts[0]], ["build", "data", "evaluation", "models", "split", "weighting"], owner, source)
        if parts[0] == "models":
            if len(parts) != 3 or parts[1] not in out["models"]:
                raise ConfigError(f"{source}: {owner} must name a model of [models] and one of its parameters, "
                                  f"e.g. models.cp.rank; models are {sorted(out['models'])}.")
            method = out["models"][parts[1]]["method"]
            _reject_unknown([parts[2]], list(model_defaults(method)), f"[models.{parts[1]}]", source)
            rule = _model_rule(method, parts[2])
        else:
            if len(parts) != 2:
                raise ConfigError(f"{source}: {owner} must be section.key, e.g. weighting.alpha.")
            _reject_unknown([parts[1]], list(_SECTIONS[parts[0]]), f"[{parts[0]}]", source)
            rule = _SECTIONS[parts[0]][parts[1]][0]
        checked[path] = _check_leaf(value, rule, parts[-1], owner, source)
    return checked


def _check_leaf(value, rule: Rule, key: str, owner: str, source: str):
    if isinstance(value, list):
        if not value:
            raise ConfigError(f"{source}: {owner} lists no values.")
        return [_apply(rule, key, v, owner, source) for v in value]
    if isinstance(value, dict):
        _reject_unknown(value.keys(), ["low", "high", "log"], owner, source)
        if "low" not in value or "high" not in value:
            raise ConfigError(f"{source}: {owner} needs 'low' and 'high' (or a list of values).")
        low, high = (_apply(rule, key, value[b], owner, source) for b in ("low", "high"))
        log = _apply(_BOOL, "log", value.get("log", False), owner, source)
        if not (isinstance(low, (int, float)) and low < high) or (log and low <= 0):
            raise ConfigError(f"{source}: {owner} needs numbers low < high (and low > 0 with log = true); "
                              f"got low={low!r}, high={high!r}.")
        return {"low": low, "high": high, "log": log}
    raise ConfigError(f"{source}: {owner} must be a list of values or a table {{low, high, log}}. Got {value!r} instead.")


def _set_dotted(raw: dict, dotted: str, value, source: str) -> None:
    parts = dotted.split(".")
    node = raw
    for part in parts[:-1]:
        child = node.setdefault(part, {})
        if not isinstance(child, dict):
            raise ConfigError(f"{source}: cannot set {dotted!r}: {part!r} is not a table.")
        node = child
    if value is not UNSET:
        node[parts[-1]] = value
    elif parts[-1] in node:
        del node[parts[-1]]
    else:
        raise ConfigError(f"{source}: cannot remove {dotted!r}: the config does not set it.")


# ---------------------------------------------------------------------- TOML output
def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise ConfigError(f"Cannot write the non-finite number {value!r} to TOML.")
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, list):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(v)}" for k, v in value.items() if v is not None) + "}"
    if dataclasses.is_dataclass(value):
        return _toml_value(dataclasses.asdict(value))
    raise ConfigError(f"Cannot write {type(value).__name__} {value!r} to TOML.")


def _toml_key(key: str) -> str:
    return key if key.replace("_", "").replace("-", "").isalnum() else json.dumps(key)


def to_toml(sections: Mapping[str, Mapping]) -> str:
    """TOML text of a two-level config (``[section]`` and ``[models.NAME]`` tables; None values left out)."""
    lines: list[str] = []

    def table(header: str, body: Mapping) -> None:
        lines.append(f"[{header}]")
        nested = []
        for key, value in body.items():
            if value is None:
                continue
            if isinstance(value, dict) and value and all(isinstance(v, dict) for v in value.values()):
                nested.append((key, value))
            else:
                lines.append(f"{_toml_key(key)} = {_toml_value(value)}")
        lines.append("")
        for key, value in nested:
            for name, sub in value.items():
                table(f"{header}.{_toml_key(key)}.{_toml_key(name)}", sub)

    for section, body in sections.items():
        if section == "models":
            for name, model in body.items():
                table(f"models.{_toml_key(name)}", model)
        else:
            table(section, body)
    return "\n".join(lines)
