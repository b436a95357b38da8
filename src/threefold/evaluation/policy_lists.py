"""List policies inside the evaluation: every model's lists rebuilt under the rules and measured beside the originals.

With a ``[policies]`` table (:mod:`threefold.ranking.policy_spec`) the
harness ranks a pool of ``pool_size(policies, K)`` candidates per query
instead of K, keeps the first K as the model's own list, and passes the pool
through :func:`threefold.ranking.policies.apply_policies`, the function the
scoring job runs, to get the list an editor would publish. That list enters
the tables as a model of its own, ``"NAME + policies"``: every metric, every
breakdown, the intervals, and a paired comparison with ``NAME`` (per user,
bootstrap interval and Wilcoxon signed-rank p), so a rule's cost in NDCG and
its gain in α-NDCG or topics per list come with their uncertainty.

What the evaluation feeds the rules:

* request columns and context modes the guardrails name, from each query's
  request row and context levels;
* repetition: the stage's training events as the history log (what each user
  clicked or kept ignoring before the evaluated window; the cap's window ends
  at the last training event), read by :func:`threefold.ranking.history.read_history`;
* factor similarity for MMR: the item factors of the evaluation's similarity
  model (the first factor model, as for ``ild_latent``), the same for every
  model so that popularity is diversified on the same geometry;
* pins: inserted at their slots as in scoring (a pinned item outside the
  query vocabulary leaves its slot empty in the measured list).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from threefold.ranking.history import id_hashes, read_history
from threefold.ranking.policies import PIN_BASE, PolicyCounts, PolicyTables, apply_policies, compile_policies, pool_size
from threefold.ranking.policy_spec import ListPolicies
from threefold.ranking.recommender import request_levels

__all__ = ["SUFFIX", "EvaluationPolicies", "prepare_policies", "policy_variants", "training_history", "aspect_codes"]

#: Suffix of the name under which a model's lists after the policies are reported.
SUFFIX = " + policies"


@dataclass
class EvaluationPolicies:
    """The compiled rules and every per-query input they need, for one query set.

    Attributes
    ----------
    tables : PolicyTables
    pool : int
        Candidates ranked per query before the rules (>= K).
    item_universe : ndarray of shape (n_items,), int64
        Universe position of each query item.
    item_hash : ndarray of shape (n_items,), uint64
    pin_items : ndarray of shape (n_pins,), int64
        Query item index of each pin (-1: not in the vocabulary).
    request_levels : dict of str to ndarray of shape (q,), object
    user_hash : ndarray of shape (q,), uint64
    counts : dict of str to PolicyCounts
        What each rule did, per reported model name.
    """

    tables: PolicyTables
    pool: int
    item_universe: np.ndarray
    item_hash: np.ndarray
    pin_items: np.ndarray
    request_levels: dict
    user_hash: np.ndarray
    counts: dict = field(default_factory=dict)

    def lists(self, name: str, pool_items: np.ndarray, pool_scores: np.ndarray, rows: np.ndarray, times: np.ndarray,
              item_factors: np.ndarray | None, k: int) -> np.ndarray:
        """The lists after the rules for a block of queries.

        Parameters
        ----------
        name : str
            Reported model name (the rules' counts are kept under it).
        pool_items : ndarray of shape (b, P), int64
            Query item indices, best score first (-1: empty).
        pool_scores : ndarray of shape (b, P), float64
        rows : ndarray of shape (b,), int64
            The block's query rows.
        times : ndarray of shape (q,), int64
            Request times of every query (pins' live intervals).
        item_factors : ndarray of shape (n_items, R) or None
        k : int

        Returns
        -------
        ndarray of shape (b, k), int64
            Query item indices, -1 past each list's end.
        """
        valid = pool_items >= 0
        at = np.maximum(pool_items, 0)
        factor_rows = -1 if item_factors is None else item_factors.shape[0]
        codes = np.where(valid & (pool_items < factor_rows), pool_items, -1)
        t = np.asarray(times, np.int64)[rows][:, None]
        pin_live = (self.tables.pin_published[None, :] <= t) & (t < self.tables.pin_expires[None, :])
        entries, counts = apply_policies(
            self.tables, universe=np.where(valid, self.item_universe[at], -1), codes=codes, valid=valid,
            scores=pool_scores, item_hash=np.where(valid, self.item_hash[at], 0).astype(np.uint64),
            request_levels={c: v[rows] for c, v in self.request_levels.items()}, user_hash=self.user_hash[rows],
            lengths=np.full(rows.size, k, np.int64), item_factors=item_factors, pin_live=pin_live)
        self.counts.setdefault(name, PolicyCounts()).merge(counts)
        pool_entry = np.take_along_axis(pool_items, np.maximum(entries, 0), axis=1)
        pins = self.pin_items[np.clip(PIN_BASE - entries, 0, max(self.pin_items.size - 1, 0))] if self.pin_items.size \
            else np.full(entries.shape, -1)
        out = np.where(entries >= 0, pool_entry, np.where(entries <= PIN_BASE, pins, -1))
        return np.take_along_axis(out, np.argsort(out < 0, axis=1, kind="stable"), axis=1)


def training_history(policies: ListPolicies, training_events: pd.DataFrame | None):
    """The history the repetition rules read in the evaluation: the training events (None when not needed)."""
    if not policies.needs_history or training_events is None:
        return None
    columns = [c for c in ("user_id", "item_id", "timestamp", "event") if c in training_events.columns]
    return read_history(training_events[columns], cap_shown=policies.cap_shown, cap_days=policies.cap_days)


def prepare_policies(policies: ListPolicies, queries, catalog: pd.DataFrame | None,
                     training_events: pd.DataFrame | None, k: int, *, history=None) -> EvaluationPolicies:
    """Compile the rules for one query set (see the module docstring); ``history``: one already read.

    Raises
    ------
    PolicyError
        A column or level the catalog does not have; repetition without
        training events.
    ValueError
        A guardrail on a column neither the events nor the context modes have.
    """
    if history is None:
        history = training_history(policies, training_events)
    labels = [str(v) for v in queries.items.labels]
    # context levels are checked with the config (a level absent from this window is no error)
    tables = compile_policies(policies, catalog, model_items=labels, history=history, catalog_name="the catalog")
    universe = tables.positions(labels)
    pin_ids = [item for item, _ in policies.pins]
    pin_items = pd.Index(labels).get_indexer(pin_ids) if pin_ids else np.zeros(0, np.int64)
    users = pd.Series(queries.users, dtype="string").fillna("").to_numpy(dtype=object)
    return EvaluationPolicies(tables=tables, pool=pool_size(policies, k), item_universe=universe,
                              item_hash=tables.item_hash[universe], pin_items=np.asarray(pin_items, np.int64),
                              request_levels=request_levels(policies, queries.requests, {
                                  c: queries.contexts[c].to_numpy(dtype=object) for c in queries.contexts.columns}),
                              user_hash=id_hashes(users))


def policy_variants(policies: ListPolicies, queries, catalog, training_events, k: int,
                    each_rule: bool = False) -> list[tuple[str, EvaluationPolicies]]:
    """(name suffix, compiled rules): all the rules (:data:`SUFFIX`), then with ``each_rule`` every rule alone.

    A rule alone is reported as ``"NAME + only RULE"`` (:meth:`ListPolicies.each_rule`).
    """
    history = training_history(policies, training_events)
    sets = [(SUFFIX, policies)]
    rules = policies.each_rule() if each_rule else []
    if len(rules) > 1:
        sets += [(f" + only {label}", rules_alone) for label, rules_alone in rules]
    return [(suffix, prepare_policies(rules_set, queries, catalog, training_events, k,
                                      history=history if rules_set.needs_history else None))
            for suffix, rules_set in sets]


def aspect_codes(column: str, queries, catalog: pd.DataFrame | None) -> np.ndarray:
    """Level code of every query item in a catalog column (-1: no level), for α-NDCG.

    Raises
    ------
    ValueError
        If the catalog is missing or lacks the column.
    """
    if catalog is None or column not in catalog.columns:
        have = [] if catalog is None else [c for c in catalog.columns if c != "item_id"]
        raise ValueError(f"[evaluation] aspect = {column!r} names a catalog column, but the catalog has "
                         f"{have or 'no columns (no items file)'}.")
    values = pd.Series(catalog[column].astype("string").to_numpy(), index=catalog["item_id"].astype(str))
    values = values[~values.index.duplicated()]
    labels = pd.Index([str(v) for v in queries.items.labels])
    codes, _ = pd.factorize(values.reindex(labels), sort=True)
    return codes.astype(np.int64)
