"""Private machinery of :mod:`threefold.demo.simulate`: the latent world and the log.

Everything here works on integer codes; :mod:`threefold.demo.simulate` turns codes into
labels, frames and files. Parameters arrive as a validated
:class:`~threefold.demo.simulate.ScenarioParameters` (read by attribute only).
"""

from __future__ import annotations

import math
import zoneinfo

import numpy as np
import pandas as pd
import pyarrow as pa
from numba import njit

from threefold.core.checks import check_choice, check_int, check_number
from threefold.data.context import Daypart

#: Item kinds of the event-log contract, in code order.
KINDS = ("article", "clip", "audio")
#: First letter of the item ids of each kind.
KIND_PREFIX = ("a", "c", "p")
#: Number of daypart personas (users whose topic taste shifts by daypart).
N_PERSONAS = 3
#: Longest delay, in seconds, between an impression and its click.
CLICK_DELAY_MAX = 600
#: Candidate pools are fixed per hour of the log.
SLOT_SECONDS = 3600
#: Largest block of requests generated at once (results depend on it).
MAX_BLOCK = 65_536
#: Local hours at which the newsroom publishes (weight 1; other hours 0.15).
_NEWSROOM_HOURS = range(6, 22)


def local_to_epoch(local_seconds: np.ndarray, timezone: str) -> np.ndarray:
    """Wall-clock seconds in ``timezone`` to epoch seconds (UTC), int64.

    Times in a spring-forward gap move forward to the first valid instant; times
    repeated at a fall-back change take the daylight-saving reading.
    """
    local = pd.DatetimeIndex(np.asarray(local_seconds, dtype="int64").astype("datetime64[s]"))
    aware = local.tz_localize(timezone, ambiguous=np.ones(len(local), dtype=bool), nonexistent="shift_forward")
    return aware.tz_convert("UTC").as_unit("s").asi8.astype(np.int64)


def daypart_codes(epoch_seconds: np.ndarray, timezone: str, starts, labels) -> np.ndarray:
    """Daypart index of each epoch second, int64, binned exactly as :class:`threefold.data.context.Daypart` bins it.

    The local hour in ``timezone`` falls in the last daypart whose start hour is
    at or before it; hours before the first start belong to the last daypart.
    """
    spec = Daypart(timezone=timezone, starts=tuple(float(h) for h in starts), labels=tuple(labels))
    found = spec.labels_for(pd.DataFrame({"timestamp": np.asarray(epoch_seconds, dtype=np.int64)}))
    return pd.Index(spec.labels).get_indexer(found.to_numpy()).astype(np.int64)


@njit(cache=True, nogil=True)
def _top_k_rows(scores: np.ndarray, k: int) -> np.ndarray:
    """Column indices of the ``k`` largest entries of each row, largest first (ties: lower index first).

    Equivalent to ``np.argsort(-scores, axis=1, kind="stable")[:, :k]``, in one
    pass per row with an insertion buffer of size ``k``.
    """
    n, c = scores.shape
    out = np.empty((n, k), dtype=np.int64)
    best = np.empty(k, dtype=scores.dtype)
    for r in range(n):
        filled = 0
        for j in range(c):
            s = scores[r, j]
            if filled < k:
                p = filled
                filled += 1
            elif s > best[k - 1]:
                p = k - 1
            else:
                continue
            while p > 0 and best[p - 1] < s:
                best[p] = best[p - 1]
                out[r, p] = out[r, p - 1]
                p -= 1
            best[p] = s
            out[r, p] = j
    return out


def _sample_rows(probs: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """One category per row of ``probs`` (rows sum to 1), int64."""
    cum = np.cumsum(probs, axis=1)
    u = rng.random(probs.shape[0]) * cum[:, -1]
    return np.minimum((u[:, None] >= cum).sum(axis=1), probs.shape[1] - 1)


def _dirichlet_rows(n: int, shares: tuple[float, ...], concentration: float, rng) -> np.ndarray:
    """``n`` habits drawn around ``shares``: Dirichlet(concentration * shares), shape (n, len(shares))."""
    alpha = concentration * np.asarray(shares, dtype=np.float64) / sum(shares)
    return rng.dirichlet(alpha, size=n)


def draw_world(params, rng: np.random.Generator) -> tuple[dict, dict]:
    """Draw the latent truth (catalog included) and the habits of the scenario.

    Returns
    -------
    truth : dict of ndarray
        The arrays of :class:`~threefold.demo.simulate.SiteTruth`, items in publish
        order (``published_at``, ``expires_at``: int64 epoch seconds).
    habits : dict of ndarray
        Request-side behavior and the logging policy's view of users.
    """
    n_u, n_i, n_t = params.n_users, params.n_items, len(params.topics)
    n_d, n_v, n_tone = len(params.daypart_labels), len(params.devices), len(params.tones)
    start_local = np.datetime64(params.start, "s").astype(np.int64)

    # Catalog: kind, topic, tone (tone shares depend on the topic), format, publish time, lifetime.
    kind = rng.choice(len(KINDS), size=n_i, p=np.asarray(params.kind_shares) / sum(params.kind_shares))
    topic_weights = rng.dirichlet(np.full(n_t, 5.0))
    topic = rng.choice(n_t, size=n_i, p=topic_weights)
    tone_by_topic = _dirichlet_rows(n_t, params.tone_shares, 10.0, rng)
    tone = _sample_rows(tone_by_topic[topic], rng)
    long_form = rng.random(n_i) < np.asarray(params.long_form_shares)[kind]
    hour_weights = np.where(np.isin(np.arange(24), _NEWSROOM_HOURS), 1.0, 0.15)
    day = rng.integers(-params.prelaunch_days, params.days, size=n_i)
    hour = rng.choice(24, size=n_i, p=hour_weights / hour_weights.sum())
    local = start_local + day * 86_400 + hour * 3600 + rng.integers(0, 3600, size=n_i)
    published = local_to_epoch(local, params.timezone)
    hours_alive = np.asarray(params.lifetime_hours)[kind] * np.exp(params.lifetime_sigma * rng.standard_normal(n_i))
    expires = published + np.round(hours_alive * 3600).astype(np.int64)
    order = np.argsort(published, kind="stable")
    kind, topic, tone, long_form = kind[order], topic[order], tone[order], long_form[order]
    published, expires = published[order], expires[order]

    jitter = params.context_jitter_sd
    kinds, dayparts, devices = list(KINDS), list(params.daypart_labels), list(params.devices)
    kind_context = jitter * rng.standard_normal((len(KINDS), n_d, n_v))
    kind_context[kinds.index("audio"), dayparts.index("morning"), devices.index("mobile")] += params.audio_commute_boost
    long_form_context = jitter * rng.standard_normal((len(KINDS), n_d))
    long_form_context[kinds.index("clip"), dayparts.index("evening")] += params.long_clip_evening_boost
    tone_context = params.tone_match * (np.eye(n_tone) - 1.0 / n_tone) + jitter * rng.standard_normal((n_tone, n_tone))
    personas = rng.standard_normal((N_PERSONAS, n_d, n_t))
    personas -= personas.mean(axis=1, keepdims=True)  # a pure daypart shift: zero on average over dayparts

    user_taste = params.taste_sd * rng.standard_normal((n_u, n_t))
    shifter = rng.random(n_u) < params.shifter_share
    user_persona = np.where(shifter, rng.integers(0, N_PERSONAS, size=n_u), -1).astype(np.int8)
    user_shift = np.where(shifter, params.shift_strength * rng.uniform(0.5, 1.5, size=n_u), 0.0)
    truth = {
        "user_taste": user_taste,
        "user_latent": params.latent_sd * rng.standard_normal((n_u, params.latent_rank)),
        "item_latent": params.latent_sd * rng.standard_normal((n_i, params.latent_rank)),
        "user_persona": user_persona,
        "user_shift": user_shift,
        "personas": personas,
        "item_quality": params.quality_sd * rng.standard_normal(n_i),
        "item_topic": topic.astype(np.int16),
        "item_kind": kind.astype(np.int8),
        "item_tone": tone.astype(np.int8),
        "item_long_form": long_form,
        "kind_context": kind_context,
        "long_form_context": long_form_context,
        "tone_context": tone_context,
        "examination": np.asarray(params.examination, dtype=np.float64),
        "published_at": published,
        "expires_at": expires,
    }

    device_by_daypart = np.exp(0.3 * rng.standard_normal((n_d, n_v)))
    device_by_daypart[dayparts.index("morning"), devices.index("mobile")] *= params.commute_mobile_factor
    habits = {
        "activity": np.exp(params.activity_sigma * rng.standard_normal(n_u)),
        "daypart": _dirichlet_rows(n_u, params.daypart_shares, params.habit_concentration, rng),
        "device": _dirichlet_rows(n_u, params.device_shares, params.habit_concentration, rng),
        "device_by_daypart": device_by_daypart,
        "page_tone": _dirichlet_rows(n_u, params.tone_shares, params.habit_concentration, rng),
        "policy_taste": (user_taste + params.policy_taste_noise * rng.standard_normal((n_u, n_t))).astype(np.float32),
    }
    return truth, habits


def relevance_logit(truth, u: np.ndarray, i: np.ndarray, d: np.ndarray, v: np.ndarray, t: np.ndarray) -> np.ndarray:
    """Log-odds of relevance of (user ``u``, item ``i``) in daypart ``d``, device ``v``, page tone ``t``.

    All inputs are int arrays of shape (n,); returns float64 of shape (n,). The
    formula is written out in the :mod:`threefold.demo.simulate` docstring.
    """
    topic, kind = truth.item_topic[i].astype(np.int64), truth.item_kind[i].astype(np.int64)
    z = truth.intercept + truth.item_quality[i] + truth.user_taste[u, topic]
    z = z + np.einsum("nr,nr->n", truth.user_latent[u], truth.item_latent[i])
    persona = truth.user_persona[u].astype(np.int64)
    shifted = np.flatnonzero(persona >= 0)
    z[shifted] += truth.user_shift[u[shifted]] * truth.personas[persona[shifted], d[shifted], topic[shifted]]
    z += truth.kind_context[kind, d, v]
    z += truth.item_long_form[i] * truth.long_form_context[kind, d]
    z += truth.tone_context[t, truth.item_tone[i].astype(np.int64)]
    return z


def _request_block(params, habits, n: int, window: tuple[int, int], rng) -> dict:
    """Draw ``n`` requests: user, epoch time, device and page tone (int arrays of shape (n,))."""
    start_local = np.datetime64(params.start, "s").astype(np.int64)
    user = rng.choice(params.n_users, size=n, p=habits["activity"] / habits["activity"].sum())
    daypart = _sample_rows(habits["daypart"][user], rng)
    weekday = (start_local // 86_400 + np.arange(params.days) + 3) % 7  # 1970-01-01 was a Thursday
    day_weights = np.where(weekday >= 5, params.weekend_activity, 1.0)
    day = rng.choice(params.days, size=n, p=day_weights / day_weights.sum())
    starts = np.asarray(params.daypart_starts, dtype=np.int64)
    length = np.diff(np.append(starts, starts[0] + 24))
    offset = np.floor(rng.random(n) * length[daypart] * 3600).astype(np.int64)
    second_of_day = (starts[daypart] * 3600 + offset) % 86_400
    epoch = local_to_epoch(start_local + day * 86_400 + second_of_day, params.timezone)
    epoch = np.clip(epoch, window[0], window[1] - 1)
    device = _sample_rows(habits["device"][user] * habits["device_by_daypart"][daypart], rng)
    page_tone = _sample_rows(habits["page_tone"][user], rng)
    return {"user": user, "timestamp": epoch, "device": device, "page_tone": page_tone}


def _show_lists(params, truth, habits, requests, pools, window, rng) -> np.ndarray:
    """Ranked lists of the logging policy, shape (n, n_positions), int64 item codes, -1 when empty.

    The policy ranks the items live during the request's hour by popularity, a
    noisy copy of the user's topic taste, freshness and Gumbel noise (context-free
    on purpose). With probability ``swap_probability`` the item at position 1 is
    swapped with the item at a uniformly drawn position k >= 2 (the swap
    intervention of Joachims, Swaminathan & Schnabel, WSDM 2017, recalled from
    memory), so every item reaches several positions and position bias is
    identifiable.
    """
    n, n_pos = requests["user"].shape[0], params.n_positions
    shown = np.full((n, n_pos), -1, dtype=np.int64)
    slot = (requests["timestamp"] - window[0]) // SLOT_SECONDS
    order = np.argsort(slot, kind="stable")
    bounds = np.flatnonzero(np.diff(slot[order])) + 1
    for rows in np.split(order, bounds):
        s = int(slot[rows[0]])
        pool = pools[s]
        if pool.size == 0:
            continue
        slot_start = window[0] + s * SLOT_SECONDS
        age_days = (slot_start - truth.published_at[pool]) / 86_400
        base = params.policy_popularity_weight * truth.item_quality[pool] - params.policy_freshness_per_day * age_days
        scores = habits["policy_taste"][requests["user"][rows]][:, truth.item_topic[pool]]
        scores *= np.float32(params.policy_taste_weight)
        scores += base.astype(np.float32)
        uniform = np.maximum(rng.random(scores.shape, dtype=np.float32), np.float32(1e-30))
        scores -= np.float32(params.policy_noise) * np.log(-np.log(uniform))  # Gumbel(0, policy_noise) noise
        k = min(n_pos, pool.size)
        top = _top_k_rows(scores, k)
        if k > 1:
            swapped = np.flatnonzero(rng.random(rows.size) < params.swap_probability)
            other = rng.integers(1, k, size=swapped.size)
            first = top[swapped, 0].copy()
            top[swapped, 0] = top[swapped, other]
            top[swapped, other] = first
        shown[rows, :k] = pool[top]
    return shown


def live_pools(truth, window: tuple[int, int]) -> list[np.ndarray]:
    """Items live during each hour of the log (clicks included), one int64 array per hour."""
    n_slots = math.ceil((window[1] - window[0]) / SLOT_SECONDS)
    slot_start = window[0] + SLOT_SECONDS * np.arange(n_slots)
    published, expires = truth.published_at, truth.expires_at
    return [
        np.flatnonzero((published <= s) & (expires >= s + SLOT_SECONDS + CLICK_DELAY_MAX)) for s in slot_start
    ]


def generate_log(params, truth, habits: dict, window: tuple[int, int]) -> dict:
    """Requests, impressions and clicks until the log holds at least ``params.n_events`` rows.

    Requests are drawn in independent blocks (each an i.i.d. sample over the
    whole window), so stopping at the request where the row count reaches
    ``n_events`` biases nothing. Returns int/float arrays: per request ``user``,
    ``timestamp``, ``device``, ``page_tone``; per impression ``request``,
    ``item``, ``position`` (1-based), ``clicked``, ``dwell`` (NaN unless
    clicked), ``click_delay`` (seconds).
    """
    pools = live_pools(truth, window)
    if not any(pool.size for pool in pools):
        raise ValueError("No item is live for a whole hour of the log (plus the click delay), so no list can be "
                         "shown: raise 'lifetime_hours' or 'n_items' of ScenarioParameters.")
    n_pos = params.n_positions
    dwell_median = np.asarray(params.dwell_median_seconds, dtype=np.float64)  # (kinds, 2): short, long form
    parts, total, block = [], 0, 0
    while total < params.n_events:
        rng = np.random.default_rng([params.seed, 1, block])
        n = min(MAX_BLOCK, max(64, math.ceil((params.n_events - total) / n_pos)))
        req = _request_block(params, habits, n, window, rng)
        shown = _show_lists(params, truth, habits, req, pools, window, rng)
        row, col = np.nonzero(shown >= 0)
        item = shown[row, col]
        d = daypart_codes(req["timestamp"], params.timezone, params.daypart_starts, params.daypart_labels)
        gamma = 1.0 / (1.0 + np.exp(-relevance_logit(
            truth, req["user"][row], item, d[row], req["device"][row], req["page_tone"][row])))
        clicked = rng.random(item.size) < truth.examination[col] * gamma
        kind = truth.item_kind[item]
        noise = np.exp(params.dwell_sigma * rng.standard_normal(item.size))
        dwell = dwell_median[kind, truth.item_long_form[item].astype(np.int64)] * noise * (0.6 + 0.8 * gamma)
        delay = np.minimum(3 + 4 * col + np.round(rng.exponential(20.0, size=item.size)), CLICK_DELAY_MAX)
        rows_per_request = (shown >= 0).sum(axis=1) + np.bincount(row, weights=clicked, minlength=n).astype(np.int64)
        cum = total + np.cumsum(rows_per_request)
        keep = n if cum[-1] < params.n_events else int(np.searchsorted(cum, params.n_events)) + 1
        kept = row < keep
        parts.append({  # narrow dtypes: a 10-million-row log holds these arrays at once
            "user": req["user"][:keep].astype(np.int32), "timestamp": req["timestamp"][:keep],
            "device": req["device"][:keep].astype(np.int8), "page_tone": req["page_tone"][:keep].astype(np.int8),
            "request": row[kept], "item": item[kept].astype(np.int32), "position": (col[kept] + 1).astype(np.int16),
            "clicked": clicked[kept], "dwell": np.where(clicked, np.round(dwell, 1), np.nan)[kept],
            "click_delay": delay[kept].astype(np.int32),
        })
        total = int(cum[keep - 1])
        block += 1
    offsets = np.cumsum([0] + [p["user"].size for p in parts[:-1]])
    out = {key: np.concatenate([p[key] for p in parts]) for key in parts[0] if key != "request"}
    out["request"] = np.concatenate([(p["request"] + o).astype(np.int32) for p, o in zip(parts, offsets)])
    return out


def id_labels(prefix: str, n: int, min_width: int) -> np.ndarray:
    """``prefix`` plus zero-padded numbers ``0 .. n - 1`` (at least ``min_width`` digits), str array."""
    width = max(min_width, len(str(max(n - 1, 0))))
    return np.asarray([f"{prefix}{k:0{width}d}" for k in range(n)])


def item_id_labels(kind: np.ndarray) -> np.ndarray:
    """Item ids: the kind's letter plus the zero-padded item number (at least 5 digits), str array."""
    digits = id_labels("", kind.size, 5)
    return np.char.add(np.asarray(KIND_PREFIX)[kind], digits)


def _take(labels, codes: np.ndarray) -> pa.Array:
    return pa.array(np.asarray(labels, dtype=object)).take(pa.array(np.asarray(codes)))


def items_frame(truth) -> pd.DataFrame:
    """The catalog frame of the contract (timestamps as int64 epoch seconds)."""
    return pa.table({
        "item_id": pa.array(truth.item_ids.astype(object)),
        "kind": _take(KINDS, truth.item_kind), "topic": _take(truth.topics, truth.item_topic),
        "tone": _take(truth.tones, truth.item_tone),
        "format": _take(("short-form", "long-form"), truth.item_long_form.astype(np.int64)),
        "published_at": truth.published_at, "expires_at": truth.expires_at,
    }).to_pandas()


def _packed_key(*keys: np.ndarray) -> np.ndarray:
    """One int64 per row that sorts like ``keys`` (non-negative ints, most significant first).

    Same order as ``np.lexsort(keys[::-1])``, about three times faster.
    """
    packed, shift = np.zeros(keys[0].size, dtype=np.int64), 0
    for key in reversed(keys):
        packed |= key.astype(np.int64) << shift
        shift += max(int(key.max(initial=0)), 1).bit_length()
    if shift > 63:
        raise OverflowError(f"The log's sort key needs {shift} bits; at most 63 fit (fewer days or events).")
    return packed


def events_frame(log: dict, truth) -> pd.DataFrame:
    """Impression and click rows in time order; requests numbered chronologically."""
    request = log["request"]
    used = np.flatnonzero(np.bincount(request, minlength=log["timestamp"].size))
    chronological = used[np.argsort(log["timestamp"][used], kind="stable")]
    number = np.zeros(log["timestamp"].size, dtype=np.int32)
    number[chronological] = np.arange(chronological.size)
    source = np.concatenate([np.arange(request.size, dtype=np.int32), np.flatnonzero(log["clicked"]).astype(np.int32)])
    is_click = np.repeat(np.array([0, 1], dtype=np.int8), [request.size, source.size - request.size])
    req = request[source]
    timestamp = log["timestamp"][req] + is_click * log["click_delay"][source]
    key = _packed_key(timestamp - timestamp.min(), number[req], is_click, log["position"][source])
    order = np.argsort(key, kind="stable")
    del key
    source, is_click, req, timestamp = source[order], is_click[order], req[order], timestamp[order]
    del order
    table = pa.table({
        "request_id": _take(id_labels("r", chronological.size, 7), number[req]),
        "timestamp": timestamp,
        "user_id": _take(truth.user_ids, log["user"][req]),
        "item_id": _take(truth.item_ids, log["item"][source]),
        "event": _take(("impression", "click"), is_click),
        "position": log["position"][source].astype(np.int64),
        "dwell_seconds": np.where(is_click == 1, log["dwell"][source], np.nan),
        "device": _take(truth.devices, log["device"][req]),
        "page_tone": _take(truth.tones, log["page_tone"][req]),
    })
    return table.to_pandas(self_destruct=True, split_blocks=True)


def check_parameters(params, owner: str) -> None:
    """Validate a ScenarioParameters (raises ValueError naming the parameter)."""
    for name in ("seed", "n_events", "n_users", "n_items", "days", "n_positions", "latent_rank"):
        check_int(name, getattr(params, name), low=0 if name == "seed" else 1, owner=owner)
    check_int("prelaunch_days", params.prelaunch_days, low=0, owner=owner)
    for name in ("swap_probability", "shifter_share"):
        check_number(name, getattr(params, name), low=0.0, high=1.0, owner=owner)
    for name in ("lifetime_sigma", "quality_sd", "taste_sd", "latent_sd", "shift_strength", "context_jitter_sd",
                 "policy_taste_noise", "policy_noise", "dwell_sigma", "activity_sigma"):
        check_number(name, getattr(params, name), low=0.0, owner=owner)
    for name in ("commute_mobile_factor", "weekend_activity", "habit_concentration"):
        check_number(name, getattr(params, name), low=0.0, low_open=True, owner=owner)
    for name in ("intercept", "audio_commute_boost", "long_clip_evening_boost", "tone_match",
                 "policy_popularity_weight", "policy_taste_weight", "policy_freshness_per_day"):
        check_number(name, getattr(params, name), owner=owner)
    for name in ("topics", "tones", "devices", "daypart_labels"):
        labels = getattr(params, name)
        if not labels or len(set(labels)) != len(labels) or not all(isinstance(x, str) and x for x in labels):
            raise ValueError(f"The {name!r} parameter of {owner} must hold distinct non-empty strings. "
                             f"Got {labels!r} instead.")
    _check_lengths(params, owner)
    for name, low_open in (("examination", True), ("long_form_shares", False)):
        for value in getattr(params, name):
            check_number(name, value, low=0.0, high=1.0, low_open=low_open, owner=owner)
    for name in ("tone_shares", "kind_shares", "device_shares", "daypart_shares", "lifetime_hours"):
        for value in getattr(params, name):
            check_number(name, value, low=0.0, low_open=True, owner=owner)
    for pair in params.dwell_median_seconds:
        for value in pair:
            check_number("dwell_median_seconds", value, low=0.0, low_open=True, owner=owner)
    starts = params.daypart_starts
    if not all(isinstance(h, int) and 0 <= h <= 23 for h in starts) or list(starts) != sorted(set(starts)):
        raise ValueError(f"The 'daypart_starts' parameter of {owner} must be strictly increasing hours "
                         f"in [0, 23]. Got {starts!r} instead.")
    for name, label in (("daypart_labels", "morning"), ("daypart_labels", "evening"), ("devices", "mobile")):
        check_choice(f"{name} entry", label, getattr(params, name), owner=owner)
    try:
        zoneinfo.ZoneInfo(params.timezone)
    except (zoneinfo.ZoneInfoNotFoundError, ValueError):
        raise ValueError(f"The 'timezone' parameter of {owner} must be an IANA zone name. "
                         f"Got {params.timezone!r} instead.") from None
    try:
        stamp = pd.Timestamp(params.start)
    except ValueError:
        stamp = None
    if stamp is None or stamp.tzinfo is not None:
        raise ValueError(f"The 'start' parameter of {owner} must be a local ISO-8601 time without offset. "
                         f"Got {params.start!r} instead.")


def _check_lengths(params, owner: str) -> None:
    expected = {
        "examination": params.n_positions, "tone_shares": len(params.tones), "device_shares": len(params.devices),
        "daypart_starts": len(params.daypart_labels), "daypart_shares": len(params.daypart_labels),
        "kind_shares": 3, "long_form_shares": 3, "lifetime_hours": 3, "dwell_median_seconds": 3,
    }
    for name, n in expected.items():
        if len(getattr(params, name)) != n:
            raise ValueError(f"The {name!r} parameter of {owner} must have length {n}. "
                             f"Got {len(getattr(params, name))} instead.")
    if any(len(pair) != 2 for pair in params.dwell_median_seconds):
        raise ValueError(f"The 'dwell_median_seconds' parameter of {owner} must hold (short, long) pairs.")

