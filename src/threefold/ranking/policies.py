"""List policies applied to each request's candidate pool, after the model's scores and before the cut to K.

The rules of :mod:`threefold.ranking.policy_spec` run in this fixed order on
the ``pool`` best-scored candidates of every request:

1. ``block``: the editorial block list removes its items;
2. ``guardrail`` rules with ``action = "exclude"`` remove the items they match
   in the requests they match;
3. ``repetition.consumed`` removes the items the user clicked in the history
   log, except the ``reconsumable`` ones;
4. ``repetition.cap`` removes the items shown to the user ``shown`` times in
   the last ``days`` days without a click;
5. ``diversity``: maximal marginal relevance (Carbonell & Goldstein, SIGIR
   1998) over the remaining items, relevance = the score min-max scaled to
   [0, 1] within the request's pool (common practice, so that λ means the same
   for every model), similarity = cosine of the item factors or "same level of
   a catalog column"; and the coverage cap ``max_per`` (an item whose level
   already has ``items`` entries in the list is passed over, so a list may come
   out shorter than K when the pool runs out);
6. ``guardrail`` rules with ``action = "demote"`` move the items they match
   ``places`` positions down (stable for the others);
7. ``pins`` put their items at their slots (1-based) in every request they are
   live for, unless the block list or an exclude guardrail forbids them there;
   a pin overrides repetition and diversity;
8. the list is cut to the request's K.

:func:`apply_policies` is pure array code; :class:`PolicyTables` holds what
it needs from the catalog, the history and the model, compiled once per job.
Every rule is counted (:class:`PolicyCounts`): the requests where it fired,
the items it removed, the items it moved.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from threefold.ranking._mmr_kernel import greedy_lists
from threefold.ranking.history import History, id_hashes, pair_keys
from threefold.ranking.policy_spec import ListPolicies, PolicyError, check_policies_against_catalog

__all__ = ["PolicyTables", "PolicyCounts", "compile_policies", "apply_policies", "pool_size", "PIN_BASE"]

#: Output entries ``PIN_BASE - j`` stand for pin ``j`` (pool columns are ``>= 0``, ``-1`` is empty).
PIN_BASE = -2


@dataclass
class PolicyCounts:
    """Per rule: requests where it fired, items it removed, items it moved (summable across parts)."""

    rules: dict[str, dict[str, int]] = field(default_factory=dict)

    def add(self, rule: str, requests: int = 0, removed: int = 0, moved: int = 0) -> None:
        row = self.rules.setdefault(rule, {"requests": 0, "removed": 0, "moved": 0})
        row["requests"] += int(requests)
        row["removed"] += int(removed)
        row["moved"] += int(moved)

    def merge(self, other: "PolicyCounts | dict") -> "PolicyCounts":
        rules = other.rules if isinstance(other, PolicyCounts) else other
        for rule, row in rules.items():
            self.add(rule, **row)
        return self

    def to_text(self) -> str:
        if not self.rules:
            return "no list policy fired"
        width = max(len(r) for r in self.rules)
        return "\n".join(f"{rule:<{width}}  fired in {row['requests']:,} requests, removed {row['removed']:,}, "
                         f"moved {row['moved']:,}" for rule, row in self.rules.items())


@dataclass(frozen=True)
class PolicyTables:
    """What the rules need, over one universe of item ids (catalog ∪ model ∪ named in the rules).

    Attributes
    ----------
    policies : ListPolicies
    universe : pandas.Index of str
    item_hash : ndarray of shape (n_universe,), uint64
        Id hashes as the event reader computes them (history keys).
    levels : dict of str to ndarray of shape (n_universe,), int64
        Level code of every item in each catalog column the rules name (-1: none).
    level_labels : dict of str to list of str
    blocked, reconsumable : ndarray of shape (n_universe,), bool
    pins : ndarray of shape (n_pins,), int64
        Universe positions of the pinned items, in slot order.
    pin_slots : ndarray of shape (n_pins,), int64
    pin_published, pin_expires : ndarray of shape (n_pins,), int64
        Live interval of each pin from the catalog's ``published_at`` /
        ``expires_at`` (open where the catalog gives none).
    history : History or None
        Looked up through its hash sets (``History.clicked_set``, ``ignored_set``).
    guardrail_items : tuple of ndarray of shape (n_universe,), bool
        The items each guardrail matches, in rule order (one gather per pool).
    """

    policies: ListPolicies
    universe: pd.Index
    item_hash: np.ndarray
    levels: dict
    level_labels: dict
    blocked: np.ndarray
    reconsumable: np.ndarray
    pins: np.ndarray
    pin_slots: np.ndarray
    pin_published: np.ndarray
    pin_expires: np.ndarray
    history: History | None = None
    guardrail_items: tuple = ()

    def positions(self, labels) -> np.ndarray:
        """Universe position of each item id (-1 for ids the tables do not know)."""
        return self.universe.get_indexer(pd.Index(np.asarray(labels, dtype=object)))

    def item_match(self, items, universe: np.ndarray) -> np.ndarray:
        """Mask of the shape of ``universe``: items whose levels match every (column, levels) of ``items``."""
        known = universe >= 0
        at = np.maximum(universe, 0)
        hit = known.copy()
        for column, levels in items:
            labels = self.level_labels[column]
            codes = [labels.index(v) for v in levels if v in labels]
            hit &= np.isin(self.levels[column][at], codes)
        return hit


def pool_size(policies: ListPolicies, k: int) -> int:
    """Candidates per request the rules choose from: ``pool``, or ``max(3·K, K + 20)``, and room for demotions and pins."""
    base = policies.pool if policies.pool is not None else max(3 * k, k + 20)
    return max(base, k + policies.max_places() + len(policies.pins))


def compile_policies(policies: ListPolicies, catalog: pd.DataFrame | None = None, *, model_items=(),
                     history: History | None = None, catalog_name: str = "the catalog",
                     context_levels=None) -> PolicyTables:
    """Check the rules against the catalog and compile them for :func:`apply_policies`.

    Parameters
    ----------
    policies : ListPolicies
    catalog : DataFrame or None
        ``item_id`` and the attribute columns the rules name.
    model_items : sequence of str
        The model's item ids (part of the universe even when the catalog lacks them).
    history : History or None
        Needed when the rules control repetition.
    catalog_name : str
    context_levels : mapping of str to tuple of str, optional
        The model's context levels, for guardrails conditioned on a context mode.

    Raises
    ------
    PolicyError
        A column or level the catalog does not have; repetition without history.
    """
    check_policies_against_catalog(policies, catalog, catalog_name, context_levels)
    if policies.needs_history and history is None:
        raise PolicyError(f"{policies.source}: [repetition] needs the history log of impressions and clicks "
                          "(--history EVENTS).")
    catalog_ids = [] if catalog is None else catalog["item_id"].astype(str).tolist()
    named = list(policies.block) + [item for item, _ in policies.pins]
    universe = pd.Index(list(dict.fromkeys(catalog_ids + [str(i) for i in model_items] + named)), dtype=object)
    n = len(universe)
    levels, level_labels = {}, {}
    for column in policies.catalog_columns():
        values = catalog[column].astype("string")
        codes, labels = pd.factorize(values, sort=True)
        full = np.full(n, -1, np.int64)
        full[universe.get_indexer(pd.Index(catalog_ids, dtype=object))] = codes
        levels[column], level_labels[column] = full, [str(v) for v in labels]
    pin_ids = [item for item, _ in policies.pins]
    live = {}
    for column, missing in (("published_at", np.iinfo(np.int64).min), ("expires_at", np.iinfo(np.int64).max)):
        live[column] = np.full(len(pin_ids), missing, np.int64)
        if catalog is not None and column in catalog.columns and pin_ids:
            row = pd.Index(catalog_ids, dtype=object).get_indexer(pin_ids)
            values = pd.array(catalog[column], dtype="Int64")
            for j, r in enumerate(row):
                if r >= 0 and not pd.isna(values[r]):
                    live[column][j] = int(values[r])
    tables = dict(policies=policies, universe=universe, item_hash=id_hashes(universe), levels=levels,
                  level_labels=level_labels, blocked=np.isin(np.arange(n), universe.get_indexer(list(policies.block))),
                  pins=universe.get_indexer([item for item, _ in policies.pins]).astype(np.int64),
                  pin_slots=np.array([slot for _, slot in policies.pins], np.int64),
                  pin_published=live["published_at"], pin_expires=live["expires_at"], history=history)
    partial = PolicyTables(reconsumable=np.zeros(n, bool), **tables)
    reconsumable = (partial.item_match(policies.reconsumable, np.arange(n)) if policies.reconsumable
                    else np.zeros(n, bool))
    guardrail_items = tuple(partial.item_match(g.items, np.arange(n)) for g in policies.guardrails)
    return PolicyTables(reconsumable=reconsumable, guardrail_items=guardrail_items, **tables)


def _request_match(when, request_levels: dict, q: int) -> np.ndarray:
    fires = np.ones(q, bool)
    for column, levels in when:
        values = pd.Series(request_levels[column], dtype="string")
        fires &= values.isin(levels).fillna(False).to_numpy(dtype=bool)
    return fires


def _compact(order: np.ndarray) -> np.ndarray:
    """Move the -1 entries of every row to its end, keeping the others in order."""
    return np.take_along_axis(order, np.argsort(order == -1, axis=1, kind="stable"), axis=1)


def _diversify(tables, keep, scores, codes, item_factors, universe, length):
    """Greedy MMR with the coverage cap over the kept pool columns; returns (order (q, length), passed over).

    Relevance is the score min-max scaled within each pool; the greedy loop is
    :func:`threefold.ranking._mmr_kernel.greedy_lists`.
    """
    policies = tables.policies
    lam = float(policies.mmr)
    q, p = keep.shape
    low = np.where(keep, scores, np.inf).min(1)
    span = np.where(keep, scores, -np.inf).max(1) - low
    span = np.where(np.isfinite(span) & (span > 1e-12), span, 1.0)  # below: ties
    rel = np.where(keep, (scores - np.where(np.isfinite(low), low, 0.0)[:, None]) / span[:, None], 0.0)

    def levels_of(column):
        return np.where(universe >= 0, tables.levels[column][np.maximum(universe, 0)], -1).astype(np.int64)

    use_factors = lam < 1.0 and policies.similarity == "factors"
    unit = np.zeros((1, 1), np.float32)
    if use_factors:  # unit rows (a few ms for 20,000 × 64)
        factors = np.asarray(item_factors, np.float32)
        norms = np.linalg.norm(factors, axis=1, keepdims=True)
        unit = np.ascontiguousarray(factors / np.where(norms > 0, norms, 1.0))
    sim_level = levels_of(policies.similarity) if lam < 1.0 and not use_factors else np.full((q, p), -1, np.int64)
    cap_column = policies.max_per_column
    level = levels_of(cap_column) if cap_column else np.full((q, p), -1, np.int64)
    n_levels = len(tables.level_labels[cap_column]) if cap_column else 0
    return greedy_lists(np.ascontiguousarray(keep), np.ascontiguousarray(rel, np.float64), lam, unit,
                        np.ascontiguousarray(codes, np.int64), sim_level, use_factors, level, n_levels,
                        int(policies.max_per or 0), int(length))


def apply_policies(tables: PolicyTables, *, universe: np.ndarray, codes: np.ndarray, valid: np.ndarray,
                   scores: np.ndarray, item_hash: np.ndarray, request_levels: dict, user_hash: np.ndarray,
                   lengths: np.ndarray, item_factors: np.ndarray | None = None,
                   pin_live: np.ndarray | None = None) -> tuple[np.ndarray, PolicyCounts]:
    """Apply the rules to a batch of candidate pools (best score first); see the module docstring.

    Parameters
    ----------
    tables : PolicyTables
    universe : ndarray of shape (q, P), int64
        Universe position of each pool entry (-1: an id the tables do not know).
    codes : ndarray of shape (q, P), int64
        Model item row of each entry (-1: none), for factor similarity.
    valid : ndarray of shape (q, P), bool
        Entries that hold a candidate (pools are padded at their end).
    scores : ndarray of shape (q, P), float64
        Model scores, descending along each row over the valid entries.
    item_hash : ndarray of shape (q, P), uint64
        Id hash of each entry (:func:`threefold.ranking.history.id_hashes`).
    request_levels : dict of str to ndarray of shape (q,)
        The value of every request column (or context mode) a guardrail names.
    user_hash : ndarray of shape (q,), uint64
    lengths : ndarray of shape (q,), int64
        Each request's K.
    item_factors : ndarray of shape (n_items, R) or None
        The model's item factors (MMR with factor similarity).
    pin_live : ndarray of shape (q, n_pins), bool, or None
        Whether each pin is live at each request (None: always).

    Returns
    -------
    entries : ndarray of shape (q, max K), int64
        Pool columns in list order; ``PIN_BASE - j`` for pin ``j``; -1 past the list's end.
    counts : PolicyCounts
    """
    policies = tables.policies
    q, p = valid.shape
    counts = PolicyCounts()
    keep = valid.copy()
    known = universe >= 0
    at = np.maximum(universe, 0)

    def remove(rule: str, hit: np.ndarray) -> None:
        nonlocal keep
        hit = hit & keep
        keep = keep & ~hit
        counts.add(rule, requests=hit.any(1).sum(), removed=hit.sum())

    if policies.block:
        remove("block", known & tables.blocked[at])
    demote = np.zeros((q, p), np.int64)
    fires_of = {}
    for g, matched in zip(policies.guardrails, tables.guardrail_items):
        fires_of[g.name] = fires = _request_match(g.when, request_levels, q)
        hit = fires[:, None] & known & matched[at]
        if g.action == "exclude":
            remove(f"guardrail {g.name!r}", hit)
        else:
            demote = np.maximum(demote, np.where(hit & keep, g.places, 0))
    history = tables.history
    if history is not None and (policies.consumed or policies.cap_shown is not None):
        keys = pair_keys(np.broadcast_to(np.asarray(user_hash, np.uint64)[:, None], (q, p)), item_hash).ravel()
        if policies.consumed:
            seen = history.clicked_set.contains(keys).reshape(q, p)
            remove("repetition: consumed", seen & ~(known & tables.reconsumable[at]))
        if policies.cap_shown is not None:
            remove("repetition: cap", history.ignored_set.contains(keys).reshape(q, p))
    kmax = int(lengths.max()) if q else 0
    length = min(p, kmax + policies.max_places())
    plain = _compact(np.where(keep, np.arange(p)[None, :], -1))[:, :length]
    if policies.mmr < 1.0 or policies.max_per is not None:
        order, passed = _diversify(tables, keep, scores, codes, item_factors, universe, length)
        in_plain = np.zeros((q, p + 1), bool)
        np.put_along_axis(in_plain, np.where(plain[:, :kmax] >= 0, plain[:, :kmax], p), True, axis=1)
        entered = (order[:, :kmax] >= 0) & ~np.take_along_axis(in_plain, np.maximum(order[:, :kmax], 0), axis=1)
        if policies.mmr < 1.0:
            counts.add("diversity: mmr", requests=entered.any(1).sum(), moved=entered.sum())
        if policies.max_per is not None:
            counts.add("diversity: max_per", requests=(passed > 0).sum(), moved=passed.sum())
    else:
        order = plain
    if demote.any():
        places = np.where(order >= 0, np.take_along_axis(demote, np.maximum(order, 0), axis=1), 0)
        key = np.where(order >= 0, np.arange(order.shape[1])[None, :] + places + 0.5 * (places > 0), np.inf)
        for g in policies.guardrails:
            if g.action == "demote":
                hit = (places >= g.places) & (places > 0) & fires_of[g.name][:, None]
                counts.add(f"guardrail {g.name!r}", requests=hit[:, :kmax].any(1).sum(), moved=hit[:, :kmax].sum())
        order = np.take_along_axis(order, np.argsort(key, axis=1, kind="stable"), axis=1)
    order = _pin(tables, order, universe, request_levels, pin_live, fires_of, counts)
    if order.shape[1] < kmax:
        order = np.concatenate([order, np.full((q, kmax - order.shape[1]), -1)], axis=1)
    order = order[:, :kmax]
    return np.where(np.arange(kmax)[None, :] < lengths[:, None], order, -1), counts


def _pin(tables, order, universe, request_levels, pin_live, fires_of, counts) -> np.ndarray:
    """Insert the pins at their slots where allowed (block list and exclude guardrails respected)."""
    policies = tables.policies
    q = order.shape[0]
    for j, (item, slot) in enumerate(policies.pins):
        u = tables.pins[j]
        allowed = np.ones(q, bool) if pin_live is None else pin_live[:, j].copy()
        if tables.blocked[u]:
            allowed[:] = False
        for g in policies.guardrails:
            if g.action == "exclude" and tables.item_match(g.items, np.array([u]))[0]:
                allowed &= ~fires_of[g.name]
        if not allowed.any():
            continue
        in_pool = (order >= 0) & (np.take_along_axis(universe, np.maximum(order, 0), axis=1) == u)
        order = _compact(np.where(in_pool & allowed[:, None], -1, order))
        s = min(slot - 1, order.shape[1])
        inserted = np.concatenate([order[:, :s], np.full((q, 1), PIN_BASE - j), order[:, s:]], axis=1)
        order = np.where(allowed[:, None], inserted, np.concatenate([order, np.full((q, 1), -1)], axis=1))
        order = _compact(order)
        counts.add(f"pin {item!r}", requests=allowed.sum(), moved=allowed.sum())
    return order
