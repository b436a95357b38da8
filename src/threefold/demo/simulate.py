"""The demo scenario: an invented media site, its event log and its ground truth.

*The Quillfen Courier* is a fictional local publisher (the town of Quillfen is
invented; the IANA timezone is only a technical setting). Readers see ranked
lists of articles, clips and audio pieces in sections such as ``civic``,
``markets`` or ``culture``; they read on a ``mobile``, ``desktop`` or ``tablet``
while a page of some ``page_tone`` is open, at some daypart of their local day.

The generative story (all planted, all saved as the scenario's truth):

* **Users** have an activity level (log-normal), daypart / device / page-tone
  habits (Dirichlet around the site's shares; mobile is more common in the
  morning), a topic taste, a small latent taste vector and, for a share of them,
  a *daypart persona* that shifts their topic taste by daypart.
* **Items** have a kind, a topic, a tone, a short- or long-form ``format``, a
  quality, a latent vector, a ``published_at`` and a short lifetime
  (``expires_at``).
* **True relevance** (the click probability given examination) of user ``u``,
  item ``i`` in daypart ``d``, on device ``v``, reading a page of tone ``t``::

      logit γ = b + quality_i + taste[u, topic_i] + <latent_u, latent_i>
                + shift_u · persona[p_u, d, topic_i]
                + kind_context[kind_i, d, v] + long_form_i · long_form_context[kind_i, d]
                + tone_context[t, tone_i]

  Planted context effects: audio on mobile in the morning (commute), long-form
  clips in the evening, items matching the tone of the page being read, and the
  personas' daypart shifts. They are strong enough that the best list for a
  reader changes with the moment (a context model gains about 10% true-relevance
  NDCG@10 over context-free MF at 200,000 log rows; docs/models.md, section 9),
  while popularity and topic taste still drive most of every list, so
  context-free baselines remain reasonable.
* **Logging policy**: a context-free ranker (popularity, a noisy copy of the
  topic taste, freshness, Gumbel noise) fills ``n_positions`` slots from the
  items live at request time; a share of the lists swaps position 1 with a random
  lower position, so the position bias is identifiable.
* **Clicks** follow the position-based model: P(click) = θ_k · γ with planted
  examination probabilities θ_k. Clicks carry dwell seconds that depend on kind,
  format and relevance.

Timestamps are int64 epoch seconds (UTC) in memory and in Parquet, and ISO-8601
strings with a ``+00:00`` offset in CSV. ``daypart`` is never a column: derive it
from the timestamp with :func:`daypart_of` (local hour in the site's timezone).
"""

from __future__ import annotations

import os
from dataclasses import asdict, dataclass, field, fields, replace
from pathlib import Path
from typing import Callable, Literal, Mapping

import numpy as np
import pandas as pd

from threefold.demo import _scenario
from threefold.demo import _scenario_files as _files
from threefold.core.checks import check_choice, check_int

__all__ = [
    "CONTEXT_COLUMNS",
    "simulator_relevance",
    "site_truth",
    "ScenarioParameters",
    "SimulatedSite",
    "SiteTruth",
    "daypart_of",
    "read_site",
    "read_truth",
    "simulate_site",
    "true_relevance",
    "write_site",
]

#: Context modes of the scenario, in the order :func:`true_relevance` expects.
CONTEXT_COLUMNS = ("daypart", "device", "page_tone")
FileFormat = Literal["parquet", "csv"]
_OWNER = "ScenarioParameters"


def _default_examination(n_positions: int = 10) -> tuple[float, ...]:
    return tuple(round(0.9 * k**-0.6, 4) for k in range(1, n_positions + 1))


@dataclass(frozen=True)
class ScenarioParameters:
    """Every knob of the demo scenario (JSON-serializable, immutable).

    Shares are relative weights (normalized on use); tuples indexed by kind
    follow ``("article", "clip", "audio")``. The defaults equal
    ``ScenarioParameters.scaled(100_000)``.

    Parameters
    ----------
    site_name : str
        The invented site's name (metadata only).
    seed : int
        Seed of every random draw; the same parameters give the same log.
    n_events : int
        Target number of log rows (impressions plus clicks).
    n_users, n_items : int
        Readers and catalog size (items published over ``prelaunch_days + days``).
    start : str
        Local wall time (ISO-8601, no offset) in ``timezone`` at which the log starts.
    days : int
        Length of the log in local days.
    timezone : str
        IANA zone of the site (a technical setting; the site and its town are invented).
    prelaunch_days : int
        Days of publishing before the log starts, so the first lists have items.
    topics, tones, devices : tuple of str
        Sections, item / page tones and device levels.
    tone_shares, device_shares, daypart_shares, kind_shares : tuple of float
        Site-wide shares; user habits are Dirichlet(``habit_concentration`` · share).
    long_form_shares : tuple of 3 float
        Probability that an item of each kind is long-form.
    lifetime_hours : tuple of 3 float
        Median lifetime per kind; lifetimes are log-normal with ``lifetime_sigma``.
    commute_mobile_factor : float
        How much more likely mobile is in the ``"morning"`` daypart.
    daypart_labels, daypart_starts : tuple
        Daypart names and their local start hours (strictly increasing; the last
        daypart wraps past midnight). Must include ``"morning"`` and ``"evening"``.
    weekend_activity : float
        Relative request volume on Saturdays and Sundays.
    activity_sigma : float
        Log-normal spread of user activity.
    n_positions, examination : int, tuple of float
        List length and the planted examination probability θ_k of each position.
    swap_probability : float
        Share of lists whose position 1 is swapped with a random lower position.
    intercept, quality_sd, taste_sd, latent_rank, latent_sd : float / int
        Relevance base log-odds, spread of item quality and user topic taste,
        rank and spread of the latent user / item vectors.
    shifter_share, shift_strength : float
        Share of users with a daypart persona, and the persona's strength.
    audio_commute_boost, long_clip_evening_boost, tone_match : float
        Planted context effects (log-odds): audio on mobile in the morning,
        long-form clips in the evening, item tone equal to the page tone.
    context_jitter_sd : float
        Spread of the random part of every context table.
    policy_popularity_weight, policy_taste_weight, policy_taste_noise, \
policy_freshness_per_day, policy_noise : float
        The logging policy's score: weights of item quality, of a noisy copy of
        the topic taste and of age in days, and the Gumbel noise scale.
    dwell_median_seconds : tuple of 3 (short, long) pairs
        Median dwell per kind and format; ``dwell_sigma`` is its log-normal spread.
    """

    site_name: str = "Quillfen Courier"
    seed: int = 20260323
    n_events: int = 100_000
    n_users: int = 1_000
    n_items: int = 411
    start: str = "2026-03-23T00:00:00"  # local wall time in `timezone`; the log covers `days` local days
    days: int = 14
    timezone: str = "Europe/Berlin"
    prelaunch_days: int = 3  # the catalog starts publishing this many days before the log
    topics: tuple[str, ...] = ("civic", "markets", "science", "culture", "sport",
                               "food", "weather", "travel", "health", "tech")
    tones: tuple[str, ...] = ("grave", "neutral", "upbeat")
    tone_shares: tuple[float, ...] = (0.3, 0.45, 0.25)
    kind_shares: tuple[float, ...] = (0.6, 0.25, 0.15)
    long_form_shares: tuple[float, ...] = (0.2, 0.3, 0.5)
    lifetime_hours: tuple[float, ...] = (30.0, 60.0, 120.0)  # median per kind
    lifetime_sigma: float = 0.35
    devices: tuple[str, ...] = ("mobile", "desktop", "tablet")
    device_shares: tuple[float, ...] = (0.55, 0.3, 0.15)
    commute_mobile_factor: float = 2.0
    daypart_labels: tuple[str, ...] = ("morning", "daytime", "evening", "night")
    daypart_starts: tuple[int, ...] = (6, 10, 17, 22)  # local start hours; the last daypart wraps past midnight
    daypart_shares: tuple[float, ...] = (0.22, 0.33, 0.33, 0.12)
    weekend_activity: float = 0.8
    habit_concentration: float = 4.0
    activity_sigma: float = 1.0
    n_positions: int = 10
    examination: tuple[float, ...] = field(default_factory=_default_examination)
    swap_probability: float = 0.25
    intercept: float = -2.8
    quality_sd: float = 0.6
    taste_sd: float = 1.0
    latent_rank: int = 4
    latent_sd: float = 0.45
    shifter_share: float = 0.85
    shift_strength: float = 2.5
    audio_commute_boost: float = 3.0
    long_clip_evening_boost: float = 2.5
    tone_match: float = 2.0
    context_jitter_sd: float = 0.15
    policy_popularity_weight: float = 1.0
    policy_taste_weight: float = 0.8
    policy_taste_noise: float = 0.7
    policy_freshness_per_day: float = 0.5
    policy_noise: float = 0.6
    dwell_median_seconds: tuple[tuple[float, float], ...] = ((45.0, 240.0), (40.0, 420.0), (180.0, 1200.0))
    dwell_sigma: float = 0.6

    def __post_init__(self) -> None:
        _scenario.check_parameters(self, _OWNER)

    @classmethod
    def scaled(cls, n_events: int = 100_000, **overrides) -> "ScenarioParameters":
        """Parameters whose user and item counts grow with ``n_events``.

        ``n_users = clip(n_events // 100, 50, 1_000_000)`` (about ten lists a
        user) and ``n_items = clip(round(1.3 * sqrt(n_events)), 150, 20_000)``
        (a bigger site publishes more, sub-linearly); ``overrides`` win.
        """
        n_events = check_int("n_events", n_events, low=1, owner=_OWNER)
        sizes = {
            "n_events": n_events,
            "n_users": int(np.clip(n_events // 100, 50, 1_000_000)),
            "n_items": int(np.clip(round(1.3 * np.sqrt(n_events)), 150, 20_000)),
        }
        return cls(**{**sizes, **overrides})

    def to_dict(self) -> dict:
        """A JSON-serializable dict of every parameter (tuples become lists in JSON)."""
        return asdict(self)

    @classmethod
    def from_dict(cls, data: Mapping) -> "ScenarioParameters":
        """Inverse of :meth:`to_dict`; missing keys take their defaults, unknown keys are refused."""
        known = {f.name for f in fields(cls)}
        unknown = sorted(set(data) - known)
        if unknown:
            raise ValueError(f"Unknown {_OWNER} parameter(s): {', '.join(map(repr, unknown))}.")

        def as_tuple(value):
            return tuple(as_tuple(v) for v in value) if isinstance(value, (list, tuple)) else value

        return cls(**{key: as_tuple(value) for key, value in data.items()})


@dataclass(frozen=True, eq=False)
class SiteTruth:
    """The planted latent truth of a scenario: everything :func:`true_relevance` needs.

    Items are in publish order, users in id order; array names follow the
    formula of the module docstring. Shapes: ``user_taste`` (n_users, n_topics),
    ``user_latent`` (n_users, rank), ``item_latent`` (n_items, rank),
    ``user_persona`` (n_users,) int8 (-1: no daypart shift), ``user_shift``
    (n_users,), ``personas`` (3, n_dayparts, n_topics), ``item_quality``
    (n_items,), ``item_topic`` / ``item_kind`` / ``item_tone`` (n_items,) int,
    ``item_long_form`` (n_items,) bool, ``kind_context`` (3, n_dayparts,
    n_devices), ``long_form_context`` (3, n_dayparts), ``tone_context`` (page
    tones, item tones), ``examination`` (n_positions,) the planted θ_k,
    ``published_at`` / ``expires_at`` (n_items,) int64 epoch seconds; all float
    arrays float64.
    """

    user_ids: np.ndarray
    item_ids: np.ndarray
    topics: tuple[str, ...]
    tones: tuple[str, ...]
    devices: tuple[str, ...]
    daypart_labels: tuple[str, ...]
    daypart_starts: tuple[int, ...]
    timezone: str
    intercept: float
    user_taste: np.ndarray
    user_latent: np.ndarray
    item_latent: np.ndarray
    user_persona: np.ndarray
    user_shift: np.ndarray
    personas: np.ndarray
    item_quality: np.ndarray
    item_topic: np.ndarray
    item_kind: np.ndarray
    item_tone: np.ndarray
    item_long_form: np.ndarray
    kind_context: np.ndarray
    long_form_context: np.ndarray
    tone_context: np.ndarray
    examination: np.ndarray
    published_at: np.ndarray
    expires_at: np.ndarray

    @property
    def context_levels(self) -> dict[str, tuple[str, ...]]:
        """Labels of each context mode, keyed by :data:`CONTEXT_COLUMNS`."""
        return {"daypart": self.daypart_labels, "device": self.devices, "page_tone": self.tones}


_TRUTH_JSON = ("topics", "tones", "devices", "daypart_labels", "daypart_starts", "timezone", "intercept")


@dataclass(frozen=True, eq=False)
class SimulatedSite:
    """A simulated log with its catalog, parameters and truth.

    Attributes
    ----------
    events : DataFrame
        The event log (columns of the event-log contract; ``timestamp`` int64 epoch seconds).
    items : DataFrame
        The catalog: ``item_id``, ``kind``, ``topic``, ``tone``, ``format``, ``published_at``, ``expires_at``.
    params : ScenarioParameters
    truth : SiteTruth
    """

    events: pd.DataFrame
    items: pd.DataFrame
    params: ScenarioParameters
    truth: SiteTruth

    @property
    def examination(self) -> np.ndarray:
        """The planted examination probabilities θ_k, shape (n_positions,), float64."""
        return self.truth.examination


def simulate_site(
    params: ScenarioParameters | None = None, *, n_events: int | None = None, random_state: int | None = None
) -> SimulatedSite:
    """Simulate the demo site.

    Parameters
    ----------
    params : ScenarioParameters or None
        The scenario; ``None`` means ``ScenarioParameters.scaled(n_events)``.
    n_events : int or None
        Target number of log rows (impressions plus clicks); overrides
        ``params.n_events``. The log stops at the first request that reaches it,
        so it holds between ``n_events`` and ``n_events + 2 * n_positions - 1`` rows.
    random_state : int or None
        Seed; overrides ``params.seed``. An int (not a Generator) so the written
        parameters regenerate the same log.

    Returns
    -------
    SimulatedSite
        Deterministic given the resolved parameters (``site.params``).
    """
    if params is None:
        params = ScenarioParameters.scaled(100_000 if n_events is None else n_events)
    overrides = {"n_events": n_events, "seed": random_state}
    params = replace(params, **{k: v for k, v in overrides.items() if v is not None})
    arrays, habits = _scenario.draw_world(params, np.random.default_rng([params.seed, 0]))
    truth = SiteTruth(
        user_ids=_scenario.id_labels("u", params.n_users, 6),
        item_ids=_scenario.item_id_labels(arrays["item_kind"]),
        topics=params.topics, tones=params.tones, devices=params.devices, daypart_labels=params.daypart_labels,
        daypart_starts=params.daypart_starts, timezone=params.timezone, intercept=params.intercept, **arrays,
    )
    start_local = np.datetime64(params.start, "s").astype(np.int64)
    window = tuple(_scenario.local_to_epoch(np.array([start_local, start_local + params.days * 86_400]),
                                            params.timezone))
    log = _scenario.generate_log(params, truth, habits, window)
    return SimulatedSite(events=_scenario.events_frame(log, truth), items=_scenario.items_frame(truth),
                         params=params, truth=truth)


def daypart_of(timestamps, scenario: ScenarioParameters | SiteTruth) -> np.ndarray:
    """Daypart label of each timestamp: the local hour in the scenario's timezone, binned by its start hours.

    Parameters
    ----------
    timestamps : array-like of shape (n,)
        int64 epoch seconds, or ISO-8601 strings with a UTC offset.
    scenario : ScenarioParameters or SiteTruth
        Supplies ``timezone``, ``daypart_starts`` and ``daypart_labels``.

    Returns
    -------
    ndarray of shape (n,), str
    """
    values = np.asarray(timestamps)
    if values.dtype.kind not in "iu":
        values = pd.DatetimeIndex(pd.to_datetime(values, format="ISO8601", utc=True)).as_unit("s").asi8
    codes = _scenario.daypart_codes(values, scenario.timezone, scenario.daypart_starts, scenario.daypart_labels)
    return np.asarray(scenario.daypart_labels)[codes]


def true_relevance(truth: SiteTruth, user_ids, item_ids, contexts) -> np.ndarray:
    """True relevance γ (click probability given examination) of (user, item, context) triples.

    Parameters
    ----------
    truth : SiteTruth
        From :func:`simulate_site` (``site.truth``) or :func:`read_truth`.
    user_ids, item_ids : array-like of str, shape (n,) or scalar
    contexts : mapping or DataFrame
        ``"daypart"``, ``"device"`` and ``"page_tone"`` labels, each of shape
        (n,) or a scalar (broadcast).

    Returns
    -------
    ndarray of shape (n,), float64
        Values in (0, 1).
    """
    missing = [c for c in CONTEXT_COLUMNS if c not in contexts]
    if missing:
        raise ValueError(f"contexts lacks the context column(s) {missing}; expected {list(CONTEXT_COLUMNS)}.")
    columns = {"user_id": (user_ids, truth.user_ids), "item_id": (item_ids, truth.item_ids)}
    columns.update({c: (contexts[c], truth.context_levels[c]) for c in CONTEXT_COLUMNS})
    try:
        values = np.broadcast_arrays(*(np.asarray(v, dtype=object) for v, _ in columns.values()))
    except ValueError:
        raise ValueError("user_ids, item_ids and the context columns must have one length (or be scalars).") from None
    codes = []
    for (name, (_, labels)), value in zip(columns.items(), values):
        value = np.atleast_1d(value)
        code = pd.Index(np.asarray(labels, dtype=object)).get_indexer(value)
        bad = np.flatnonzero(code < 0)
        if bad.size:
            raise ValueError(f"{bad.size} {name} value(s) are not in the scenario, "
                             f"e.g. {value[bad[0]]!r} at row {bad[0]}.")
        codes.append(code)
    return 1.0 / (1.0 + np.exp(-_scenario.relevance_logit(truth, *codes)))


def write_site(site: SimulatedSite, out_dir: str | os.PathLike, *, file_format: FileFormat = "parquet") -> Path:
    """Write a simulated site to a folder (created if missing); returns the folder.

    Files: ``events`` and ``items`` (``.parquet`` with int64 epoch-second
    timestamps, or ``.csv`` with ISO-8601 ``+00:00`` strings), ``scenario.json``
    (the parameters), ``truth.json`` (labels and scalars) and ``truth.npz`` (the
    truth arrays). Each file is renamed into place once complete.
    """
    check_choice("file_format", file_format, ("parquet", "csv"), owner="write_site")
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    _files.write_table(site.events, out, "events", file_format)
    _files.write_table(site.items, out, "items", file_format)
    _files.write_json(out / "scenario.json", {"parameters": site.params.to_dict()})
    _files.write_json(out / "truth.json", {k: getattr(site.truth, k) for k in _TRUTH_JSON})
    _files.write_arrays(out / "truth.npz",
                        {f.name: getattr(site.truth, f.name) for f in fields(SiteTruth) if f.name not in _TRUTH_JSON})
    return out


def read_truth(out_dir: str | os.PathLike) -> SiteTruth:
    """Read the truth written by :func:`write_site` (JSON and ``.npz``, never pickle)."""
    out = Path(out_dir)
    data = _files.read_json(out / "truth.json")
    labels = {k: tuple(data[k]) if isinstance(data[k], list) else data[k] for k in _TRUTH_JSON}
    arrays = _files.read_arrays(out / "truth.npz")
    missing = sorted({f.name for f in fields(SiteTruth)} - set(_TRUTH_JSON) - set(arrays))
    if missing:
        raise ValueError(f"{out / 'truth.npz'} lacks the array(s) {missing}.")
    return SiteTruth(**labels, **arrays)


def read_site(out_dir: str | os.PathLike) -> SimulatedSite:
    """Read a folder written by :func:`write_site` (Parquet or CSV); ids come back as strings."""
    out = Path(out_dir)
    params = ScenarioParameters.from_dict(_files.read_json(out / "scenario.json")["parameters"])
    return SimulatedSite(events=_files.read_table(out, "events"), items=_files.read_table(out, "items"),
                         params=params, truth=read_truth(out))


def simulator_relevance(truth) -> Callable[[pd.DataFrame, np.ndarray], np.ndarray]:
    """True relevance of a simulated site as the harness's ``true_relevance`` callable.

    Parameters
    ----------
    truth : SiteTruth

    Returns
    -------
    callable
        ``f(requests, item_ids)``: the daypart from each request's timestamp in
        the scenario's timezone, ``device`` and ``page_tone`` from its columns.
    """
    def relevance(requests: pd.DataFrame, item_ids: np.ndarray) -> np.ndarray:
        contexts = {"daypart": daypart_of(requests["timestamp"].to_numpy(dtype=np.int64), truth),
                    "device": requests["device"].to_numpy(dtype=object),
                    "page_tone": requests["page_tone"].to_numpy(dtype=object)}
        return true_relevance(truth, requests["user_id"].to_numpy(dtype=object), item_ids, contexts)

    return relevance


def site_truth(events_path: str | os.PathLike) -> Callable | None:
    """The true relevance of a site written by :func:`write_site`, when ``events_path`` is one; else None.

    A folder holding ``truth.json`` and ``truth.npz`` next to the events is a
    simulated site; its true relevance adds ``ndcg_true`` to the metrics. This
    is the ``truth`` the command line hands the train pipeline and sweeps.
    """
    folder = Path(events_path).parent
    if not ((folder / "truth.json").is_file() and (folder / "truth.npz").is_file()):
        return None
    return simulator_relevance(read_truth(folder))
