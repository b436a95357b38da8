"""The demo site's editorial rules, and what they cost and buy measured against the simulator's true relevance.

:func:`demo_rules` writes a policy file in the demo catalog's own terms
(``tone``, ``kind``, ``topic``; the page's ``page_tone``; the site's dayparts):
nothing upbeat beside a grave page, clips demoted in the first daypart,
nothing the reader already clicked except audio, a frequency cap, MMR and at
most three stories per topic. :func:`true_effect` compares lists scored
without and with them on the simulator's true click probabilities γ, over
every item live at each request (the invented site; the figures describe it,
not a real audience).
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from threefold.demo.simulate import SimulatedSite, daypart_of, true_relevance
from threefold.evaluation.policy_effect import policy_effect

__all__ = ["demo_rules", "true_effect"]


def demo_rules(site: SimulatedSite) -> str:
    """The demo's policy file (TOML text; docs/policies.md explains each rule)."""
    first_daypart = site.params.daypart_labels[0]
    return f"""# Editorial rules of the demo site (docs/policies.md). Columns and levels are the demo catalog's own.
pool = 60

[[guardrail]]
name = "nothing upbeat beside a grave page"
when = {{page_tone = ["grave"]}}
items = {{tone = ["upbeat"]}}
action = "exclude"

[[guardrail]]
name = "clips later in the {first_daypart}"
when = {{daypart = ["{first_daypart}"]}}
items = {{kind = ["clip"]}}
action = "demote"
places = 3

[repetition]
consumed = true
reconsumable = {{kind = ["audio"]}}
cap = {{shown = 3, days = 7}}

[diversity]
mmr = 0.8
similarity = "factors"
max_per = {{column = "topic", items = 3}}
"""


def true_effect(site: SimulatedSite, requests: pd.DataFrame, without: pd.DataFrame, with_rules: pd.DataFrame,
                *, k: int = 10, n_resamples: int = 500) -> pd.DataFrame:
    """:func:`threefold.evaluation.policy_effect.policy_effect` on the simulator's truth.

    Parameters
    ----------
    site : SimulatedSite
    requests : DataFrame
        ``request_id``, ``user_id``, ``timestamp``, ``device``, ``page_tone``.
    without, with_rules : DataFrame
        Outputs of ``threefold score`` for those requests (``request_id``, ``rank``, ``item_id``).
    k : int, default=10
    n_resamples : int, default=500

    Returns
    -------
    DataFrame (see :func:`policy_effect`); relevance γ of every live item, aspect = topic.
    """
    truth = site.truth
    requests = requests.drop_duplicates("request_id").reset_index(drop=True)
    q, n = len(requests), len(truth.item_ids)
    times = requests["timestamp"].to_numpy(np.int64)
    live = (truth.published_at[None, :] <= times[:, None]) & (truth.expires_at[None, :] > times[:, None])
    r, i = np.nonzero(live)
    context = {"daypart": daypart_of(times, truth).astype(object)[r],
               "device": requests["device"].to_numpy(object)[r], "page_tone": requests["page_tone"].to_numpy(object)[r]}
    relevance = np.zeros((q, n))
    relevance[r, i] = true_relevance(truth, requests["user_id"].to_numpy(object)[r], truth.item_ids[i], context)
    position = pd.Index(np.asarray(truth.item_ids, dtype=object))
    row_of = pd.Index(requests["request_id"].astype(str))

    def lists(frame: pd.DataFrame) -> np.ndarray:
        out = np.full((q, k), -1, np.int64)
        frame = frame[(frame["rank"] > 0) & (frame["rank"] <= k)]
        out[row_of.get_indexer(frame["request_id"].astype(str)), frame["rank"].to_numpy() - 1] = \
            position.get_indexer(frame["item_id"].to_numpy(dtype=object))
        return out

    aspect = np.asarray(truth.item_topic, np.int64)  # the planted topic of every item
    return policy_effect(lists(without), lists(with_rules), relevance, requests["user_id"].to_numpy(object),
                         aspect=aspect, examination=np.asarray(truth.examination)[:k], k=k, n_resamples=n_resamples)
