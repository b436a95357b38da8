"""Private parts of :mod:`threefold.evaluation.harness`: breakdown levels, beyond-accuracy rows, context sensitivity.

``rank_block`` is the one place where a block of scores becomes top-K lists;
it asserts that every model ranked exactly the shared candidates.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from threefold.evaluation import _tables as tables
from threefold.core.checks import check_int
from threefold.evaluation.beyond_accuracy import (
    catalog_coverage, context_sensitivity, exposure_counts, gini_index, intra_list_diversity, novelty,
    temporal_diversity,
)
from threefold.ranking.topk import top_k
from threefold.evaluation.queries import QuerySet, catalog_times
from threefold.core.vocabulary import UNKNOWN


def rank_block(fn, local: np.ndarray, mask: np.ndarray, k: int, name: str, *, with_scores: bool = False):
    """Top-k of one block, asserting that the model ranked exactly the candidates.

    Only the items that are a candidate of some query of the block are scored
    (``fn(rows, items)``), in increasing index order, so the tie rule (lower
    item index first) is unchanged; with news catalogs most items are not live.
    With ``with_scores`` also returns the score of each ranked entry (float64,
    -inf for an empty slot), for the list policies.
    """
    cols = np.flatnonzero(mask.any(axis=0))
    if cols.size == mask.shape[1]:
        sub = mask
        scores = np.asarray(fn(local, None))
    else:
        sub = mask[:, cols]
        scores = np.asarray(fn(local, cols))
    ranked = top_k(scores, k, None if sub.all() else sub)
    picked = None
    if with_scores:
        picked = np.where(ranked >= 0, np.take_along_axis(np.asarray(scores, np.float64), np.maximum(ranked, 0), axis=1),
                          -np.inf)
    if cols.size != mask.shape[1]:
        ranked = np.where(ranked >= 0, cols[np.maximum(ranked, 0)], -1)
    expected = np.minimum(mask.sum(axis=1), k)
    valid = ranked >= 0
    rows = np.nonzero(valid)[0]
    if not np.array_equal(valid.sum(axis=1), expected) or not mask[rows, ranked[valid]].all():
        raise AssertionError(f"Model {name!r} did not rank exactly the shared candidates "
                             "(every candidate needs a finite score).")
    return (ranked, picked) if with_scores else ranked


def query_groups(queries: QuerySet, training_events: pd.DataFrame | None, activity_bins) -> list:
    """(breakdown, level, mask) of the query-level breakdowns."""
    groups = [("all", "all", None)]
    for mode in queries.contexts.columns:
        labels = queries.contexts[mode].to_numpy(dtype=object)
        groups += [(mode, level, labels == level) for level in sorted(set(labels))]
    if training_events is not None:
        clicks = training_events[training_events["event"] == "click"] if "event" in training_events.columns else training_events
        counts = clicks["user_id"].astype(str).value_counts()
        activity = counts.reindex(queries.users, fill_value=0).to_numpy(dtype=np.float64)
        labels = tables.bin_labels(activity, tuple(activity_bins), "")
        labels[labels == f"<={activity_bins[0]:g}"] = f"cold (<={activity_bins[0]:g})"
        groups += [("user_activity", level, labels == level) for level in sorted(set(labels))]
    return groups


def pair_groups(queries: QuerySet, training_events, catalog, age_bins_hours) -> tuple[list, dict]:
    """(breakdown, level, mask over relevant pairs) by item age and by training status; the cold share."""
    query, item = tables.relevant_pairs(queries)
    if queries.candidates.published is not None:
        published = queries.candidates.published
    else:
        published = catalog_times(queries.items, catalog, training_events)[0]
    known = published[item] != np.iinfo(np.int64).max
    age = np.where(known, (queries.times[query] - published[item]) / 3600.0, np.nan)
    age_labels = tables.bin_labels(age, tuple(age_bins_hours), "h")
    groups = [("item_age", level, age_labels == level) for level in sorted(set(age_labels))]
    share: dict = {}
    if training_events is not None:
        user_seen = pd.Index(training_events["user_id"].astype(str).unique()).get_indexer(queries.users[query]) >= 0
        labels = np.asarray(queries.items.labels, dtype=object)[item]
        item_seen = pd.Index(training_events["item_id"].astype(str).unique()).get_indexer(labels) >= 0
        status = np.where(user_seen, np.where(item_seen, "seen", "new item"),
                          np.where(item_seen, "new user", "new user, new item")).astype(object)
        groups += [("training_status", level, status == level) for level in sorted(set(status))]
        n = max(query.size, 1)
        share = {"clicks": int(query.size), "new_user": float((~user_seen).sum() / n),
                 "new_item": float((~item_seen).sum() / n), "new_user_or_item": float((~(user_seen & item_seen)).sum() / n)}
    return groups, share


def _item_topics(queries: QuerySet, catalog: pd.DataFrame | None) -> np.ndarray | None:
    """Topic code per universe item (a distinct negative code for an item without a topic)."""
    if catalog is None or "topic" not in catalog.columns:
        return None
    topics = pd.Series(catalog["topic"].to_numpy(), index=catalog["item_id"].astype(str))
    topics = topics[~topics.index.duplicated()].reindex(queries.items.labels)
    codes = pd.factorize(topics)[0].astype(np.int64)
    missing = codes < 0
    codes[missing] = -1 - np.flatnonzero(missing)
    return codes


def beyond_rows(name, ranked, queries, ks, users, n_users, ever, catalog, training_events, sim_factors, opts) -> list:
    """Coverage and Gini over all lists; ILD, novelty, temporal diversity per list with intervals."""
    rows = []
    compact = np.cumsum(ever) - 1
    lists = np.where(ranked >= 0, compact[np.maximum(ranked, 0)], -1)
    n_catalog = int(ever.sum())
    topics = _item_topics(queries, catalog)
    popularity = n_train_users = None
    if training_events is not None:
        clicks = training_events[training_events["event"] == "click"] if "event" in training_events.columns else training_events
        pairs = clicks[["user_id", "item_id"]].astype(str).drop_duplicates()
        code = queries.items.encode(pairs["item_id"], policy="drop").codes
        popularity = np.bincount(code[code >= 0], minlength=queries.n_items)
        n_train_users = int(pairs["user_id"].nunique())
    day = queries.times // 86_400
    firsts = pd.DataFrame({"user": users, "day": day, "row": np.arange(len(queries))}).drop_duplicates(["user", "day"])
    pairs_td = firsts.merge(firsts.assign(day=firsts["day"] - 1), on=["user", "day"], suffixes=("_prev", "_next"))
    for k in ks:
        if n_catalog >= 2:
            exposure = exposure_counts(lists[:, :k], n_catalog)
            rows.append(tables.row(name, "coverage", k, (catalog_coverage(lists[:, :k], n_catalog), np.nan, np.nan, n_users)))
            if exposure.sum() > 0:
                rows.append(tables.row(name, "gini", k, (gini_index(exposure), np.nan, np.nan, n_users)))
        per_list = {}
        if topics is not None:
            per_list["ild_topic"] = intra_list_diversity(ranked[:, :k], item_topics=topics)
        if sim_factors is not None:
            per_list["ild_latent"] = intra_list_diversity(ranked[:, :k], item_factors=sim_factors)
        if popularity is not None and n_train_users:
            per_list["novelty"] = novelty(ranked[:, :k], popularity, n_train_users)
        for metric, values in per_list.items():
            rows.append(tables.row(name, metric, k, tables.interval(values, users, n_users, **opts)))
        if len(pairs_td):
            prev, nxt = pairs_td["row_prev"].to_numpy(), pairs_td["row_next"].to_numpy()
            values = temporal_diversity(ranked[prev, :k], ranked[nxt, :k])
            rows.append(tables.row(name, "temporal_diversity", k,
                                   tables.interval(values, pairs_td["user"].to_numpy(), n_users, **opts)))
    return rows


def sensitivity_rows(schedule, queries: QuerySet, ks, users, n_users, sample: int, opts) -> list:
    """Context sensitivity: each sampled user's first query ranked at every level of each context mode."""
    sample = check_int("sensitivity_users", sample, low=0, owner="evaluate")
    _, first = np.unique(users, return_index=True)
    if sample == 0 or first.size == 0 or queries.contexts.shape[1] == 0:
        return []
    rng = np.random.default_rng(opts["random_state"])
    pick = np.sort(rng.choice(first, size=min(sample, first.size), replace=False))
    step_of = np.empty(len(queries), dtype=np.int64)
    for s, (rows, _) in enumerate(schedule):
        step_of[rows] = s
    kmax, out = max(ks), []
    for mode in queries.contexts.columns:
        levels = np.asarray(sorted(set(queries.contexts[mode]) - {UNKNOWN}), dtype=object)
        if levels.size < 2:
            continue
        lists = {name: np.full((pick.size, levels.size, kmax), -1, dtype=np.int64) for name in schedule[0][1]}
        for s in np.unique(step_of[pick]):
            at = np.flatnonzero(step_of[pick] == s)
            variant = queries.take(np.repeat(pick[at], levels.size)).with_context(mode, np.tile(levels, at.size))
            mask = variant.candidates.mask(np.arange(len(variant)))
            for name, ranker in schedule[s][1].items():
                ranked = rank_block(ranker.bind(variant), np.arange(len(variant)), mask, kmax, name)
                lists[name][at] = ranked.reshape(at.size, levels.size, kmax)
        for name, values in lists.items():
            for k in ks:
                result = context_sensitivity(values[:, :, :k])
                for metric, per_user in (("jaccard", result.jaccard), ("kendall", result.kendall)):
                    stats = tables.interval(per_user, users[pick], n_users, **opts)
                    out.append(tables.row(name, metric, k, stats, "context_sensitivity", mode))
    return out
