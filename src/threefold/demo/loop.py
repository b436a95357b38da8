"""A closed-loop simulation on the demo site: each policy shows lists, the simulator clicks, the policy learns.

Offline metrics score a model on the logging policy's lists. A refresh policy
changes what readers are shown, and so what it learns next: that needs a loop.
:func:`closed_loop` trains one model on the first days of a simulated log, then
replays the requests of the following hours (their users, times, devices and
page tones) against each policy:

1. the policy ranks the items live at the request's hour (the candidates,
   taken from the site's catalog, new stories included; an item the model has
   no row for scores 0, as in serving);
2. the simulator draws clicks on the top 10 under its position model: a click
   at position k with probability ``θ_k · γ``, with γ the planted true
   relevance and θ the planted examination (the environment);
3. the policy's own impressions and clicks join its event stream, and every
   ``step_hours`` it refreshes (or retrains: every step for "retrain", at
   each midnight for "nightly")
   from that stream. With ``shared_traffic`` (default) the policy is one module
   of the page: the log's own impressions and clicks of the hour (the site's
   other modules) join the stream too, so new stories get events elsewhere.

Policies: ``stale`` (the trained model, never updated), ``nightly`` (a full
retrain at each midnight of the site's time zone on every event so far),
``retrain`` (a full retrain every step on every event so far: what the
refresh approximates, for the accuracy gap), ``hourly`` (:func:`threefold.models.refresh.refresh_result` every step, the
code path of ``threefold refresh``), ``hourly+metadata`` (also rows predicted
from catalog attributes for items without events), ``hourly+explore`` (also
the LinUCB bonus of :mod:`threefold.ranking.explore` with one exploration
slot per list), ``popularity`` (clicks in the last 24 hours of its own stream,
as of each request) and ``oracle`` (the true γ).

Reported per policy: true-relevance NDCG@10 (gain γ, ideal over the live pool)
and clicks per 1,000 impressions, over every replayed request. The demo site
is invented; the figures describe it, not any real audience.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass

import numpy as np
import pandas as pd

from threefold.core.defaults import LOOP_POLICIES
from threefold.core.progress import progress
from threefold.data.build import build_tensor
from threefold.data.context import ColumnContext, Daypart
from threefold.demo.simulate import SimulatedSite, daypart_of, true_relevance
from threefold.models.cp.model import fit_cp
from threefold.models.metadata import fit_metadata_map
from threefold.models.refresh import RefreshState, refresh_result
from threefold.ranking.recommender import Recommender

__all__ = ["POLICIES", "LoopResult", "closed_loop"]

POLICIES = LOOP_POLICIES
K = 10
HOUR = 3600


@dataclass
class LoopResult:
    """Per-policy totals of a closed loop."""

    table: pd.DataFrame  # policy, requests, ndcg_true_at_10, clicks_per_1000, seconds
    hours: int
    train_events: int

    def to_text(self) -> str:
        lines = [f"closed loop over {self.hours} h after training on {self.train_events:,} events "
                 "(true-relevance NDCG@10 and clicks per 1,000 impressions; higher is better)"]
        lines += ["  " + line for line in self.table.to_string(index=False, float_format=lambda v: f"{v:.4f}").splitlines()]
        return "\n".join(lines)


def closed_loop(site: SimulatedSite, *, train_days: float, hours: int, step_hours: int = 1,
                structure: str = "user*item:12 + item*daypart:4 + item*device:4 + item*page_tone:4",
                rank: int = 24, sweeps: int = 10, explore_beta: float = 0.5, policies=POLICIES,
                seed: int = 0, shared_traffic: bool = True, echo=print, show_progress: bool = True) -> LoopResult:
    """Run the closed loop of the module docstring.

    Parameters
    ----------
    site : SimulatedSite
    train_days : float
        Days of the log (from its first event) the initial model is trained on.
    hours : int
        Hours replayed after the training cutoff.
    step_hours : int, default=1
        Refresh every this many hours (the refresh policies).
    structure, rank, sweeps
        The CP model (:func:`threefold.models.cp.model.fit_cp`).
    explore_beta : float, default=0.5
        BETA of the exploring policy.
    policies : sequence of str
    seed : int
        Seed of the simulated clicks (the same for every policy).
    shared_traffic : bool, default=True
        The policy is one module of the page: the log's own impressions and
        clicks of each replayed hour (the site's other traffic) join its event
        stream beside its own. False: a pure loop, the policy learns only from
        what it showed itself (then a new item it never shows never gets events).
    echo : callable, default=print
        Receives one line per finished policy.
    show_progress : bool, default=True
        Report the replayed hours of each policy (:func:`threefold.core.progress.progress`).

    Returns
    -------
    LoopResult
    """
    unknown = [p for p in policies if p not in POLICIES]
    if unknown:
        raise ValueError(f"Unknown policies {unknown}; choose among {list(POLICIES)}.")
    p = site.params
    contexts = [Daypart(timezone=p.timezone, starts=p.daypart_starts, labels=p.daypart_labels),
                ColumnContext("device"), ColumnContext("page_tone")]
    events = site.events
    cutoff = int(events["timestamp"].min() + train_days * 86_400) // HOUR * HOUR
    history = events[events["timestamp"] < cutoff]
    end = int(events["timestamp"].max())
    if cutoff + hours * HOUR > end + HOUR:
        raise ValueError(f"The log ends {max((end - cutoff) // HOUR + 1, 0)} h after its first {train_days:g} days; "
                         f"{hours} h cannot be replayed (simulate more days or replay fewer hours).")
    replay = events[(events["timestamp"] >= cutoff) & (events["timestamp"] < cutoff + hours * HOUR)]
    requests = replay.drop_duplicates("request_id")[["request_id", "user_id", "timestamp", "device", "page_tone"]]
    if requests.empty:
        raise ValueError(f"The log has no request in the {hours} h after its first {train_days:g} days.")
    base = _fit(history, contexts, structure, rank, sweeps)
    rows = []
    for policy in policies:
        started = time.perf_counter()
        gains, clicks, shown = _run_policy(policy, site, base, history, requests, contexts, cutoff, hours,
                                           step_hours, structure, rank, sweeps, explore_beta, seed,
                                           replay if shared_traffic else None, show_progress)
        rows.append({"policy": policy, "requests": len(requests), "ndcg_true_at_10": float(np.mean(gains)),
                     "clicks_per_1000": 1000.0 * clicks / max(shown, 1), "seconds": time.perf_counter() - started})
        echo(f"  {policy}: ndcg_true_at_10 {rows[-1]['ndcg_true_at_10']:.4f}, "
             f"{rows[-1]['clicks_per_1000']:.1f} clicks per 1,000 impressions")
    return LoopResult(table=pd.DataFrame(rows), hours=hours, train_events=len(history))


def _fit(events, contexts, structure, rank, sweeps):
    tensor, _ = build_tensor(events, contexts)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return fit_cp(tensor, rank=rank, structure=structure, reg=0.1, max_sweeps=sweeps, tol=0, random_state=1)


def _run_policy(policy, site, base, history, requests, contexts, cutoff, hours, step_hours, structure, rank,
                sweeps, explore_beta, seed, other_traffic, show_progress):
    """One policy through the replayed hours; returns per-request NDCG gains, clicks and impressions."""
    truth = site.truth
    rng = np.random.default_rng([seed, 7])
    stream = [history]
    model, state = base, RefreshState.fresh(base)
    metadata = _metadata_map(site, base) if policy == "hourly+metadata" else None
    gains, clicks, shown = [], 0, 0
    times = requests["timestamp"].to_numpy(dtype=np.int64)
    with progress(hours, f"loop {policy}", "hours", enabled=show_progress) as bar:
        for hour in range(hours):
            start = cutoff + hour * HOUR
            since = pd.concat(stream[1:]) if len(stream) > 1 else history.iloc[:0]
            if policy == "nightly" and hour > 0 and _local_day(start, site) != _local_day(start - HOUR, site):
                model = _fit(pd.concat(stream), contexts, structure, rank, sweeps)
                state = RefreshState.fresh(model)
                stream = [pd.concat(stream)]  # the new base: later hours refresh nothing (nightly only)
            elif policy == "retrain" and hour > 0 and hour % step_hours == 0:
                model = _fit(pd.concat(stream), contexts, structure, rank, sweeps)
                state = RefreshState.fresh(model)
            elif policy.startswith("hourly") and hour % step_hours == 0 and len(since):
                rows = _metadata_rows(metadata, site, base, start) if metadata is not None else None
                model, state, _ = refresh_result(base, since, contexts, {}, metadata_rows=rows)
            batch = requests[(times >= start) & (times < start + HOUR)]
            if not batch.empty:
                lists = _rank(policy, model, state, batch, start, site, contexts, stream, explore_beta)
                relevance = _relevance(truth, batch, lists)
                clicked = (rng.random(lists.shape) < truth.examination[np.arange(K)][None, :] * relevance) & (lists >= 0)
                gains.extend(_true_ndcg(truth, batch, relevance, _live(truth, start)))
                clicks += int(clicked.sum())
                shown += int((lists >= 0).sum())
                own = _events(batch, lists, clicked, truth)
                if other_traffic is not None:
                    others = other_traffic[(other_traffic["timestamp"] >= start)
                                           & (other_traffic["timestamp"] < start + HOUR)]
                    own = pd.concat([own.assign(request_id="loop-" + own["request_id"].astype(str)), others],
                                    ignore_index=True)
                stream.append(own)
            bar.update(1)
    return gains, clicks, shown


def _live(truth, start: int) -> np.ndarray:
    """Site codes of the items live at ``start`` (the candidates of that hour)."""
    return np.flatnonzero((truth.published_at <= start) & (truth.expires_at > start))


def _rank(policy, model, state, batch, start, site, contexts, stream, explore_beta) -> np.ndarray:
    """Top-K item codes of the site (shape (n, K), -1 past the end) for each request of ``batch``."""
    truth = site.truth
    pool = _live(truth, start)
    if policy == "oracle":
        scores = _relevance(truth, batch, np.broadcast_to(pool, (len(batch), pool.size)))
        order = np.argsort(-scores, axis=1, kind="stable")[:, :K]
        return _pad(pool[order])
    if policy == "popularity":
        recent = pd.concat(stream)
        t0 = int(batch["timestamp"].min())
        window = recent[(recent["timestamp"] >= t0 - 86_400) & (recent["event"] == "click")]
        counts = window["item_id"].value_counts()
        score = counts.reindex(truth.item_ids[pool]).fillna(0.0).to_numpy()
        order = np.argsort(-score, kind="stable")[:K]
        return _pad(np.broadcast_to(pool[order], (len(batch), min(K, pool.size))))
    covariance = None
    if policy == "hourly+explore" and state.covariance_rows.size:
        covariance = (state.covariance_rows, state.covariance, state.covariance_columns)
    recommender = Recommender(model, contexts, timezone=site.params.timezone, item_origin=state.origins[1],
                              item_covariance=covariance)
    frame = batch.loc[batch.index.repeat(pool.size)].reset_index(drop=True)
    frame["item_id"] = np.tile(truth.item_ids[pool], len(batch))
    ranked = recommender.recommend(frame, k=K, explore=explore_beta if covariance is not None else None)
    position = pd.Index(np.asarray(truth.item_ids, dtype=object)).get_indexer(ranked["item_id"].to_numpy(dtype=object))
    request = pd.Index(batch["request_id"]).get_indexer(ranked["request_id"])
    out = np.full((len(batch), K), -1, np.int64)
    out[request, ranked["rank"].to_numpy() - 1] = position
    return out


def _pad(codes: np.ndarray) -> np.ndarray:
    out = np.full((codes.shape[0], K), -1, np.int64)
    out[:, :codes.shape[1]] = codes
    return out


def _relevance(truth, batch, lists) -> np.ndarray:
    """γ of every (request, listed item), shape of ``lists`` (0 where the list ends)."""
    n, width = lists.shape
    valid = lists >= 0
    codes = np.where(valid, lists, 0)
    context = {c: np.repeat(batch[c].to_numpy(dtype=object), width) for c in ("device", "page_tone")}
    context["daypart"] = np.repeat(daypart_of(batch["timestamp"].to_numpy(dtype=np.int64), truth).astype(object), width)
    gamma = true_relevance(truth, np.repeat(batch["user_id"].to_numpy(dtype=object), width),
                           truth.item_ids[codes.ravel()], context).reshape(n, width)
    return np.where(valid, gamma, 0.0)


def _true_ndcg(truth, batch, relevance, pool) -> list[float]:
    """NDCG@K with gains γ; the ideal list is the K most relevant live items."""
    discount = 1.0 / np.log2(np.arange(2, K + 2))
    ideal = -np.sort(-_relevance(truth, batch, np.broadcast_to(pool, (len(batch), pool.size))), axis=1)[:, :K]
    best = (ideal * discount[: ideal.shape[1]]).sum(axis=1)
    got = (relevance * discount).sum(axis=1)
    return list(np.where(best > 0, got / np.where(best > 0, best, 1.0), 0.0))


def _events(batch, lists, clicked, truth) -> pd.DataFrame:
    """The loop's impression and click rows in the event-log contract."""
    r, c = np.nonzero(lists >= 0)
    base = pd.DataFrame({"request_id": batch["request_id"].to_numpy()[r],
                         "timestamp": batch["timestamp"].to_numpy(dtype=np.int64)[r],
                         "user_id": batch["user_id"].to_numpy()[r], "item_id": truth.item_ids[lists[r, c]],
                         "event": "impression", "position": c + 1, "dwell_seconds": np.nan,
                         "device": batch["device"].to_numpy()[r], "page_tone": batch["page_tone"].to_numpy()[r]})
    hit = clicked[r, c]
    click = base[hit].assign(event="click", timestamp=base["timestamp"][hit] + 5 + 4 * c[hit], dwell_seconds=60.0)
    return pd.concat([base, click], ignore_index=True)


def _local_day(epoch: int, site) -> str:
    return str(pd.Timestamp(epoch, unit="s", tz="UTC").tz_convert(site.params.timezone).date())


def _metadata_map(site, base):
    labels = pd.Index(base.vocabularies[1].labels, dtype=object)
    catalog = site.items[site.items["item_id"].isin(labels)].reset_index(drop=True)
    rows = labels.get_indexer(catalog["item_id"])
    return fit_metadata_map(catalog, base.item_matrix()[rows])


def _metadata_rows(metadata_map, site, base, start) -> dict:
    items = site.items
    live = items[(items["published_at"] <= start + HOUR) & (items["expires_at"] > start)].reset_index(drop=True)
    return dict(zip(live["item_id"].astype(str), metadata_map.predict(live)))
