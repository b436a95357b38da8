"""List policies as declared by an editor: parsed from TOML (a file or a config's ``[policies]`` table), checked once.

A policy file names the publisher's own catalog columns and levels; nothing
in it is built in. Example (the demo's)::

    pool = 60                                   # candidates the rules choose from
    block = ["a00017"]                          # never shown
    pins = [{item = "a00003", slot = 1}]        # shown at this slot when live

    [[guardrail]]
    name = "nothing upbeat beside a grave page"
    when = {page_tone = ["grave"]}              # request columns (or context modes)
    items = {tone = ["upbeat"]}                 # catalog columns
    action = "exclude"                          # or "demote", with places = N

    [repetition]
    consumed = true                             # not what the user already clicked ...
    reconsumable = {kind = ["audio"]}           # ... unless it is meant to be heard again
    cap = {shown = 3, days = 7}                 # shown 3 times in 7 days, never clicked: rest

    [diversity]
    mmr = 0.8                                   # λ of maximal marginal relevance; 1 = off
    similarity = "factors"                      # cosine of item factors, or a catalog column
    max_per = {column = "topic", items = 3}     # at most 3 items of one topic per list

Every mistake is one :class:`PolicyError` naming the table and key; the
catalog check (:func:`check_policies_against_catalog`) refuses unknown
columns and levels before any event or request is read.
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Mapping

import pandas as pd

__all__ = ["Guardrail", "ListPolicies", "PolicyError", "read_policies", "check_policies_against_catalog",
           "GUARDRAIL_ACTIONS"]

GUARDRAIL_ACTIONS = ("exclude", "demote")
_TOP_KEYS = {"pool", "block", "pins", "guardrail", "repetition", "diversity"}


class PolicyError(ValueError):
    """A list policy that cannot be applied as written."""


@dataclass(frozen=True)
class Guardrail:
    """One editorial rule: in requests matching ``when``, items matching ``items`` are excluded or demoted.

    ``when`` and ``items`` map a column to its levels: a request (an item)
    matches when, for every column named, its value is one of the levels (AND
    over columns, OR over levels). An empty ``when`` matches every request.
    """

    name: str
    when: tuple[tuple[str, tuple[str, ...]], ...]
    items: tuple[tuple[str, tuple[str, ...]], ...]
    action: str = "exclude"
    places: int = 0


@dataclass(frozen=True)
class ListPolicies:
    """Every rule of a policy file; see the module docstring for the keys.

    Attributes
    ----------
    pool : int or None
        Candidates per request the rules choose from (None: ``max(3 · K, K + 20)``).
    block : tuple of str
        Item ids never shown.
    pins : tuple of (item id, slot)
        Items placed at a 1-based slot of every list they are live for.
    guardrails : tuple of Guardrail
    consumed : bool
        Remove the items the user clicked in the history log.
    reconsumable : tuple of (column, levels)
        Items exempt from ``consumed`` (e.g. a series meant to be heard again).
    cap_shown, cap_days : int or None, float
        Frequency cap: an item shown ``cap_shown`` times in the last ``cap_days``
        days of the history without a click is removed.
    mmr : float
        λ of maximal marginal relevance (Carbonell & Goldstein 1998); 1 = off.
    similarity : str
        ``"factors"`` (cosine of the model's item factors) or a catalog column
        (similarity 1 for the same level, 0 otherwise).
    max_per_column, max_per : str or None, int or None
        Coverage: at most ``max_per`` items of one level of this column per list.
    """

    pool: int | None = None
    block: tuple[str, ...] = ()
    pins: tuple[tuple[str, int], ...] = ()
    guardrails: tuple[Guardrail, ...] = ()
    consumed: bool = False
    reconsumable: tuple[tuple[str, tuple[str, ...]], ...] = ()
    cap_shown: int | None = None
    cap_days: float = 7.0
    mmr: float = 1.0
    similarity: str = "factors"
    max_per_column: str | None = None
    max_per: int | None = None
    source: str = field(default="the policies", compare=False)

    @property
    def needs_history(self) -> bool:
        """Whether the rules read the history log (repetition control)."""
        return self.consumed or self.cap_shown is not None

    def catalog_columns(self) -> list[str]:
        """Catalog columns the rules name, in first-use order."""
        names = [c for g in self.guardrails for c, _ in g.items] + [c for c, _ in self.reconsumable]
        if self.similarity != "factors":
            names.append(self.similarity)
        if self.max_per_column is not None:
            names.append(self.max_per_column)
        return list(dict.fromkeys(names))

    def each_rule(self) -> list[tuple[str, "ListPolicies"]]:
        """One policy set per rule, the others switched off (for measuring what each rule costs and buys).

        The rules: every guardrail on its own, the block list with the pins,
        repetition (consumed and the cap), diversity (MMR and ``max_per``).
        """
        none = replace(self, block=(), pins=(), guardrails=(), consumed=False, reconsumable=(), cap_shown=None,
                       mmr=1.0, max_per_column=None, max_per=None)
        out = [(f"guardrail {g.name!r}", replace(none, guardrails=(g,))) for g in self.guardrails]
        if self.block or self.pins:
            out.append(("block and pins", replace(none, block=self.block, pins=self.pins)))
        if self.needs_history:
            out.append(("repetition", replace(none, consumed=self.consumed, reconsumable=self.reconsumable,
                                              cap_shown=self.cap_shown, cap_days=self.cap_days)))
        if self.mmr < 1.0 or self.max_per is not None:
            out.append(("diversity", replace(none, mmr=self.mmr, max_per_column=self.max_per_column,
                                             max_per=self.max_per)))
        return out

    def aspect_column(self) -> str | None:
        """The catalog column the diversity rules work on (``max_per``, else a catalog similarity), or None."""
        if self.max_per_column is not None:
            return self.max_per_column
        return None if self.similarity == "factors" else self.similarity

    def request_columns(self) -> list[str]:
        """Request columns (or context modes) the guardrails condition on."""
        return list(dict.fromkeys(c for g in self.guardrails for c, _ in g.when))

    def max_places(self) -> int:
        return max((g.places for g in self.guardrails if g.action == "demote"), default=0)


def _fail(source: str, where: str, problem: str):
    raise PolicyError(f"{source}: {where}: {problem}")


def _levels(source: str, where: str, table) -> tuple[tuple[str, tuple[str, ...]], ...]:
    if not isinstance(table, Mapping):
        _fail(source, where, f"expected a table of column = [levels], got {table!r}")
    out = []
    for column, levels in table.items():
        if isinstance(levels, (str, int, float)):
            levels = [levels]
        if not isinstance(levels, list) or not levels or not all(isinstance(v, (str, int, float)) for v in levels):
            _fail(source, f"{where}.{column}", f"expected a non-empty list of levels, got {levels!r}")
        out.append((str(column), tuple(str(v) for v in levels)))
    return tuple(out)


def _positive_int(source: str, where: str, value, low: int = 1) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < low:
        _fail(source, where, f"expected an integer of at least {low}, got {value!r}")
    return int(value)


def _unknown_keys(source: str, where: str, table: Mapping, allowed: set) -> None:
    unknown = sorted(set(table) - allowed)
    if unknown:
        _fail(source, where, f"unknown key(s) {unknown}; allowed: {sorted(allowed)}")


def read_policies(source: str | os.PathLike | Mapping, *, name: str | None = None) -> ListPolicies:
    """Parse and check a policy file (TOML) or an already parsed table.

    Parameters
    ----------
    source : path or mapping
        A TOML file, or the mapping of a config's ``[policies]`` table.
    name : str or None
        How messages name a mapping (default ``"[policies]"``).

    Returns
    -------
    ListPolicies

    Raises
    ------
    PolicyError
        A malformed key or value, named with its table and key.
    """
    if isinstance(source, Mapping):
        raw, name = dict(source), name or "[policies]"
    else:
        path = Path(source)
        name = str(path)
        if not path.is_file():
            raise PolicyError(f"{name}: no such policy file.")
        try:
            raw = tomllib.loads(path.read_text(encoding="utf-8"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
            raise PolicyError(f"{name}: not a readable TOML file ({error}).") from None
    _unknown_keys(name, "top level", raw, _TOP_KEYS)
    pool = None if raw.get("pool") is None else _positive_int(name, "pool", raw["pool"])
    block = raw.get("block", [])
    if not isinstance(block, list) or not all(isinstance(b, str) and b for b in block):
        _fail(name, "block", f"expected a list of item ids (text), got {block!r}")
    pins = []
    for j, pin in enumerate(raw.get("pins", [])):
        where = f"pins[{j}]"
        if not isinstance(pin, Mapping):
            _fail(name, where, f"expected {{item = ..., slot = ...}}, got {pin!r}")
        _unknown_keys(name, where, pin, {"item", "slot"})
        if not isinstance(pin.get("item"), str) or not pin["item"]:
            _fail(name, f"{where}.item", f"expected an item id (text), got {pin.get('item')!r}")
        pins.append((pin["item"], _positive_int(name, f"{where}.slot", pin.get("slot"))))
    slots = [s for _, s in pins]
    if len(set(slots)) < len(slots):
        _fail(name, "pins", f"two pins share a slot ({sorted(slots)})")
    guardrails = []
    for j, rule in enumerate(raw.get("guardrail", [])):
        where = f"guardrail[{j}]"
        if not isinstance(rule, Mapping):
            _fail(name, where, f"expected a table, got {rule!r}")
        _unknown_keys(name, where, rule, {"name", "when", "items", "action", "places"})
        action = rule.get("action", "exclude")
        if action not in GUARDRAIL_ACTIONS:
            _fail(name, f"{where}.action", f"expected one of {list(GUARDRAIL_ACTIONS)}, got {action!r}")
        if "items" not in rule:
            _fail(name, where, "a guardrail needs items = {column = [levels]}")
        places = 0
        if action == "demote":
            places = _positive_int(name, f"{where}.places", rule.get("places"))
        elif "places" in rule:
            _fail(name, f"{where}.places", "places applies to action = \"demote\" only")
        guardrails.append(Guardrail(name=str(rule.get("name", f"guardrail {j + 1}")),
                                    when=_levels(name, f"{where}.when", rule.get("when", {})),
                                    items=_levels(name, f"{where}.items", rule["items"]), action=action,
                                    places=places))
    repetition = raw.get("repetition", {})
    _unknown_keys(name, "repetition", repetition, {"consumed", "reconsumable", "cap"})
    consumed = repetition.get("consumed", False)
    if not isinstance(consumed, bool):
        _fail(name, "repetition.consumed", f"expected true or false, got {consumed!r}")
    cap_shown, cap_days = None, 7.0
    if "cap" in repetition:
        cap = repetition["cap"]
        if not isinstance(cap, Mapping):
            _fail(name, "repetition.cap", f"expected {{shown = N, days = D}}, got {cap!r}")
        _unknown_keys(name, "repetition.cap", cap, {"shown", "days"})
        cap_shown = _positive_int(name, "repetition.cap.shown", cap.get("shown"))
        cap_days = cap.get("days", 7.0)
        if isinstance(cap_days, bool) or not isinstance(cap_days, (int, float)) or not 0 < cap_days <= 3660:
            _fail(name, "repetition.cap.days", f"expected a number of days in (0, 3660], got {cap_days!r}")
    diversity = raw.get("diversity", {})
    _unknown_keys(name, "diversity", diversity, {"mmr", "similarity", "max_per"})
    mmr = diversity.get("mmr", 1.0)
    if isinstance(mmr, bool) or not isinstance(mmr, (int, float)) or not 0.0 <= mmr <= 1.0:
        _fail(name, "diversity.mmr", f"expected λ in [0, 1], got {mmr!r}")
    similarity = diversity.get("similarity", "factors")
    if not isinstance(similarity, str) or not similarity:
        _fail(name, "diversity.similarity", f"expected \"factors\" or a catalog column, got {similarity!r}")
    max_column = max_per = None
    if "max_per" in diversity:
        spec = diversity["max_per"]
        if not isinstance(spec, Mapping) or not isinstance(spec.get("column"), str):
            _fail(name, "diversity.max_per", f"expected {{column = \"...\", items = M}}, got {spec!r}")
        _unknown_keys(name, "diversity.max_per", spec, {"column", "items"})
        max_column, max_per = spec["column"], _positive_int(name, "diversity.max_per.items", spec.get("items"))
    return ListPolicies(pool=pool, block=tuple(block), pins=tuple(sorted(pins, key=lambda p: p[1])),
                        guardrails=tuple(guardrails), consumed=consumed,
                        reconsumable=_levels(name, "repetition.reconsumable", repetition.get("reconsumable", {})),
                        cap_shown=cap_shown, cap_days=float(cap_days), mmr=float(mmr), similarity=similarity,
                        max_per_column=max_column, max_per=max_per, source=name)


def check_policies_against_catalog(policies: ListPolicies, catalog: pd.DataFrame, catalog_name: str,
                                   context_levels: Mapping[str, tuple[str, ...]] | None = None) -> None:
    """Refuse rules naming a column or a level the catalog (or a context mode) does not have.

    Parameters
    ----------
    policies : ListPolicies
    catalog : DataFrame
        The items catalog (``item_id`` and attribute columns).
    catalog_name : str
        How to name the catalog in messages (its file).
    context_levels : mapping of str to tuple of str, optional
        Levels of the model's context modes, for ``when`` keys that name one.

    Raises
    ------
    PolicyError
    """
    if policies.catalog_columns() and catalog is None:
        raise PolicyError(f"{policies.source}: the rules name catalog columns {policies.catalog_columns()}; "
                          "give the items catalog (--items).")
    where = {}
    for g in policies.guardrails:
        for column, levels in g.items:
            where.setdefault(column, []).append((f"guardrail {g.name!r}", levels))
    for column, levels in policies.reconsumable:
        where.setdefault(column, []).append(("repetition.reconsumable", levels))
    for column in (policies.similarity if policies.similarity != "factors" else None, policies.max_per_column):
        if column is not None:
            where.setdefault(column, []).append(("diversity", ()))
    for column, uses in where.items():
        if column not in catalog.columns or column == "item_id":
            attributes = [c for c in catalog.columns if c != "item_id"]
            raise PolicyError(f"{policies.source}: {uses[0][0]} names the column {column!r}, which {catalog_name} "
                              f"does not have (its attribute columns: {attributes}).")
        present = set(catalog[column].dropna().astype(str))
        for rule, levels in uses:
            missing = [v for v in levels if v not in present]
            if missing:
                raise PolicyError(f"{policies.source}: {rule} names level(s) {missing} of column {column!r}, which "
                                  f"{catalog_name} does not have (its levels: {sorted(present)[:20]}).")
    for g in policies.guardrails:
        for column, levels in g.when:
            if context_levels and column in context_levels:
                missing = [v for v in levels if v not in set(context_levels[column])]
                if missing:
                    raise PolicyError(f"{policies.source}: guardrail {g.name!r} names level(s) {missing} of the "
                                      f"context mode {column!r}, which has {list(context_levels[column])}.")
