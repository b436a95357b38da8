"""One parameter table per model: names, defaults, rules and help, read by every entry point.

A model module declares its parameters once, as a :class:`ParamTable`::

    CP_PARAMS = ParamTable("CPModel", [
        Param("rank", 16, int_rule(low=1), "Components of a plain CP ..."),
        ...
    ])

and everything else reads that table: the fit function validates its arguments
with :meth:`ParamTable.check`, the estimator (a :class:`ParamModel`) takes its
keyword-only parameters, defaults, ``get_params`` and ``set_params`` from it, the
config loader and the sweep space take their rules and defaults from it, and the
command line prints its help from it. Adding a parameter means one new ``Param``
line (and using it in the fit function); a test checks that the table, the
estimator and the fit function's signature agree.

Rules follow scikit-learn's idea of parameter constraints checked once at the
boundary, with one sentence for every failure::

    The 'rank' parameter of CPModel must be an int in the range [1, inf). Got 0 instead.
"""

from __future__ import annotations

import copy
import difflib
import inspect
import numbers
from dataclasses import dataclass
from typing import Callable, ClassVar, Iterable, Mapping, Sequence

import numpy as np

from threefold.core.checks import check_choice, check_int, check_number

__all__ = ["Rule", "Param", "ParamTable", "ParamModel", "int_rule", "float_rule", "choice_rule", "type_rule",
           "list_rule", "one_of", "optional", "callable_rule", "seed_rule", "dtype_rule", "ints_rule", "STRING",
           "BOOLEAN", "STRINGS"]

#: ``rule(key, value, owner) -> value``: returns the checked (possibly normalized) value or raises ValueError.
Rule = Callable[[str, object, str], object]


# ---------------------------------------------------------------------- rules
def int_rule(low: int | None = None, high: int | None = None) -> Rule:
    """An int in ``[low, high]``."""
    return lambda key, value, owner: check_int(key, value, low=low, high=high, owner=owner)


def float_rule(low: float | None = None, high: float | None = None, low_open: bool = False) -> Rule:
    """A finite real number in the range (returned as float)."""
    return lambda key, value, owner: check_number(key, value, low=low, high=high, low_open=low_open, owner=owner)


def choice_rule(*options) -> Rule:
    """One of ``options``."""
    return lambda key, value, owner: check_choice(key, value, options, owner=owner)


def type_rule(kind: type, label: str) -> Rule:
    """An instance of ``kind`` (bools are not ints here, ints are not bools)."""
    def rule(key, value, owner):
        if not isinstance(value, kind) or isinstance(value, bool) != (kind is bool):
            raise ValueError(f"The {key!r} parameter of {owner} must be {label}. Got {value!r} instead.")
        return value
    return rule


def list_rule(item: Rule, label: str, min_len: int = 0) -> Rule:
    """A list (or tuple) of values each passing ``item``; returned as a list."""
    def rule(key, value, owner):
        if not isinstance(value, (list, tuple)) or len(value) < min_len:
            raise ValueError(f"The {key!r} parameter of {owner} must be a list of {label}"
                             f"{f' (at least {min_len})' if min_len else ''}. Got {value!r} instead.")
        return [item(key, v, owner) for v in value]
    return rule


def one_of(*rules: Rule, label: str) -> Rule:
    """The first of ``rules`` that accepts the value."""
    def rule(key, value, owner):
        for candidate in rules:
            try:
                return candidate(key, value, owner)
            except ValueError:
                continue
        raise ValueError(f"The {key!r} parameter of {owner} must be {label}. Got {value!r} instead.")
    return rule


def optional(inner: Rule) -> Rule:
    """None, or a value passing ``inner``."""
    return lambda key, value, owner: None if value is None else inner(key, value, owner)


def callable_rule(key, value, owner):
    """A callable or None."""
    if value is not None and not callable(value):
        raise ValueError(f"The {key!r} parameter of {owner} must be callable or None. Got {value!r} instead.")
    return value


def seed_rule(key, value, owner):
    """None, a non-negative int or a numpy Generator (the only ways randomness enters)."""
    if value is None or isinstance(value, np.random.Generator):
        return value
    if isinstance(value, numbers.Integral) and not isinstance(value, bool) and value >= 0:
        return int(value)
    raise ValueError(f"The {key!r} parameter of {owner} must be None, an int in the range [0, inf) or a "
                     f"numpy Generator. Got {value!r} instead.")


def dtype_rule(key, value, owner):
    """None (the tensor's dtype), float32 or float64 (as a name, a numpy dtype or a type)."""
    if value is None:
        return None
    try:
        dtype = np.dtype(value)
    except TypeError:
        dtype = None
    if dtype not in (np.dtype(np.float32), np.dtype(np.float64)):
        raise ValueError(f"The {key!r} parameter of {owner} must be one of None, 'float32', 'float64'. "
                         f"Got {value!r} instead.")
    return value


def ints_rule(low: int = 1, min_len: int = 2) -> Rule:
    """An int, or a list of ints (one per mode), each at least ``low``."""
    return one_of(int_rule(low=low), list_rule(int_rule(low=low), "ints", min_len=min_len),
                  label=f"an int in the range [{low}, inf) or a list of such ints, one per mode")


STRING = type_rule(str, "a string")
BOOLEAN = type_rule(bool, "true or false")
STRINGS = list_rule(STRING, "strings")


# ---------------------------------------------------------------------- the table
@dataclass(frozen=True)
class Param:
    """One model parameter.

    Attributes
    ----------
    name : str
        The one name code, configs and the command line use.
    default : object
        The default (the only place it is written down).
    rule : Rule
        Checks a value given from Python.
    doc : str
        One line of help (shown by ``threefold models`` and in config errors).
    config : Rule, bool
        True: configurable with ``rule``; a Rule: configurable with this
        narrower rule (e.g. only the string choices of ``init``); False: Python
        only (callbacks, arrays).
    """

    name: str
    default: object
    rule: Rule
    doc: str
    config: Rule | bool = True

    @property
    def config_rule(self) -> Rule | None:
        """The rule a config value passes, or None when the parameter cannot be configured."""
        if self.config is False:
            return None
        return self.rule if self.config is True else self.config


class ParamTable:
    """The parameters of one model, in order.

    Parameters
    ----------
    owner : str
        Named in messages (``"CPModel"``).
    params : sequence of Param
    """

    def __init__(self, owner: str, params: Sequence[Param]):
        names = [p.name for p in params]
        if len(set(names)) != len(names):
            raise ValueError(f"ParamTable {owner!r} names a parameter twice: {names}.")
        self.owner = owner
        self.params = tuple(params)
        self._by_name = {p.name: p for p in params}

    def __iter__(self):
        return iter(self.params)

    def __contains__(self, name: str) -> bool:
        return name in self._by_name

    def __getitem__(self, name: str) -> Param:
        return self._by_name[name]

    @property
    def names(self) -> tuple[str, ...]:
        return tuple(self._by_name)

    def defaults(self, *, configurable_only: bool = False) -> dict[str, object]:
        """Name -> a fresh copy of its default."""
        return {p.name: copy.deepcopy(p.default) for p in self.params
                if not configurable_only or p.config_rule is not None}

    def check(self, name: str, value: object, owner: str | None = None) -> object:
        """Check one value by its rule; returns the normalized value."""
        return self._by_name[name].rule(name, value, owner or self.owner)

    def check_all(self, values: Mapping[str, object], owner: str | None = None) -> dict[str, object]:
        """Check every given value (unknown names refused with the closest valid one)."""
        self.reject_unknown(values, owner)
        return {name: self.check(name, value, owner) for name, value in values.items()}

    def reject_unknown(self, names: Iterable[str], owner: str | None = None) -> None:
        for name in names:
            if name not in self._by_name:
                raise TypeError(f"{owner or self.owner} has no parameter {name!r}{_suggest(name, self.names)} "
                                f"Parameters: {', '.join(self.names)}.")

    def signature(self) -> inspect.Signature:
        """Keyword-only signature with the table's defaults (for ``help()`` and introspection)."""
        return inspect.Signature([inspect.Parameter(p.name, inspect.Parameter.KEYWORD_ONLY, default=p.default)
                                  for p in self.params])

    def help_lines(self) -> list[str]:
        """``name = default  doc`` per parameter (configurable ones first, Python-only ones marked)."""
        out = []
        for p in sorted(self.params, key=lambda p: p.config_rule is None):
            mark = "" if p.config_rule is not None else "  (Python only)"
            out.append(f"{p.name} = {p.default!r}  {p.doc}{mark}")
        return out


def _suggest(name: str, valid: Sequence[str]) -> str:
    close = difflib.get_close_matches(str(name), list(valid), n=1, cutoff=0.5)
    return f"; did you mean {close[0]!r}?" if close else "."


class ParamModel:
    """Base of every estimator: keyword-only parameters from the class's :class:`ParamTable`.

    ``__init__`` stores the parameters and nothing else (values are checked
    when ``fit`` runs, as in scikit-learn); ``get_params`` and ``set_params``
    read the table, so a new parameter needs no code here.
    """

    params: ClassVar[ParamTable]

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        if "params" in cls.__dict__:
            cls.__signature__ = cls.params.signature()

    def __init__(self, **params):
        table = type(self).params
        table.reject_unknown(params, type(self).__name__)
        for name, default in table.defaults().items():
            setattr(self, name, params.get(name, default))

    def get_params(self) -> dict[str, object]:
        """The parameters, by name (the names configs and the command line use)."""
        return {name: getattr(self, name) for name in type(self).params.names}

    def set_params(self, **params) -> "ParamModel":
        """Set parameters by name; returns self."""
        type(self).params.reject_unknown(params, type(self).__name__)
        for name, value in params.items():
            setattr(self, name, value)
        return self

    def __repr__(self) -> str:
        changed = {k: v for k, v in self.get_params().items() if not _same(v, type(self).params[k].default)}
        return f"{type(self).__name__}({', '.join(f'{k}={v!r}' for k, v in changed.items())})"


def _same(a, b) -> bool:
    try:
        return bool(a == b)
    except Exception:  # arrays and other values without a plain truth value
        return a is b
