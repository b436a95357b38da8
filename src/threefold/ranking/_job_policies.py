"""List policies inside a batch scoring job: their inputs staged once, compiled per process, counted per part.

Staged under ``OUT/_staging/policies/``: ``rules.json`` (the parsed policy
table), ``catalog.parquet`` (``item_id``, the columns the rules name and the
live times) and ``history.npz`` (the clicked and ignored pair keys of
:func:`threefold.ranking.history.read_history`, or the digest given in its
place, :func:`threefold.ranking.history.write_history`). Every part writes what each
rule did to ``policy-counts-NNNNN.json`` before its own file is renamed into
place, and :func:`summed_counts` adds them up for the manifest.
"""

from __future__ import annotations

import hashlib
import json
import os
import tomllib
from pathlib import Path
from typing import Callable

import pandas as pd

from threefold.core.bundle import sha256_file
from threefold.data.events import load_items
from threefold.ranking.history import History, is_history_digest, load_history, read_history, write_history
from threefold.ranking.policies import PolicyCounts, PolicyTables, compile_policies
from threefold.ranking.policy_spec import PolicyError, read_policies

__all__ = ["policy_digest", "history_for_rules", "stage_policies", "staged_policies", "write_counts", "summed_counts"]

_FOLDER = "policies"
_LIVE = ("published_at", "expires_at")


def _rules(policies) -> dict:
    """The policy table as a mapping (a TOML file read, a mapping copied)."""
    if isinstance(policies, (str, os.PathLike)):
        path = Path(policies)
        if not path.is_file():
            raise PolicyError(f"{path}: no such policy file.")
        try:
            return tomllib.loads(path.read_text(encoding="utf-8"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as error:
            raise PolicyError(f"{path}: not a readable TOML file ({error}).") from None
    return dict(policies)


def policy_digest(policies, items, history) -> str | None:
    """SHA-256 of what the policies depend on (rules, catalog file, history file); None without policies."""
    if policies is None:
        return None
    digest = hashlib.sha256(json.dumps(_rules(policies), sort_keys=True, default=str).encode())
    for source in (items, history):
        if isinstance(source, pd.DataFrame):
            digest.update(pd.util.hash_pandas_object(source, index=False).to_numpy().tobytes())
        elif source is not None:
            digest.update(sha256_file(source).encode() if Path(source).is_file() else str(source).encode())
        digest.update(b"\x00")
    return digest.hexdigest()


def stage_policies(staging: Path, policies, items, history, recommender, report: Callable[[int], None]) -> None:
    """Check the rules against the catalog and the model, read the history, write the staged inputs.

    Raises
    ------
    PolicyError
        Before any request is read: a rule naming an unknown column or level, or
        repetition without a history log.
    """
    raw = _rules(policies)
    name = str(policies) if isinstance(policies, (str, os.PathLike)) else "[policies]"
    spec = read_policies(policies if isinstance(policies, (str, os.PathLike)) else raw)
    catalog, catalog_name = None, "the catalog"
    if items is not None:
        catalog_name = str(items) if not isinstance(items, pd.DataFrame) else "the catalog"
        catalog = items if isinstance(items, pd.DataFrame) else load_items(items, timezone=_zone(recommender))
    context_levels = {n: tuple(v.labels) for n, v in zip(recommender.context_names,
                                                         recommender.resolved.vocabularies[2:])}
    loaded = None
    if spec.needs_history:
        if history is None:
            raise PolicyError(f"{name}: [repetition] needs the history log of impressions and clicks (--history).")
        loaded = history_for_rules(history, spec, timezone=_zone(recommender), report=report)
    compile_policies(spec, catalog, model_items=recommender.item_labels, history=loaded, catalog_name=catalog_name,
                     context_levels=context_levels)
    folder = staging / _FOLDER
    folder.mkdir(parents=True, exist_ok=True)
    (folder / "rules.json").write_text(json.dumps({"source": name, "rules": raw}, default=str))
    if catalog is not None:
        keep = ["item_id"] + [c for c in spec.catalog_columns() + list(_LIVE) if c in catalog.columns]
        catalog[list(dict.fromkeys(keep))].to_parquet(folder / "catalog.parquet", index=False)
    if loaded is not None:
        write_history(loaded, folder / "history.npz")


def history_for_rules(history, spec, *, timezone=None, report=None) -> History:
    """The history the rules need: a digest of ``threefold history`` checked against the rules' cap, or a log read.

    Raises
    ------
    PolicyError
        A digest made for another frequency cap than the rules'.
    """
    if not is_history_digest(history):
        return read_history(history, cap_shown=spec.cap_shown, cap_days=spec.cap_days, timezone=timezone,
                            report=report)
    loaded = load_history(history)
    made = (loaded.cap_shown, loaded.cap_days)
    wanted = (spec.cap_shown, None if spec.cap_shown is None else float(spec.cap_days))
    if made != wanted:
        def cap(shown, days):
            return "no frequency cap" if shown is None else f"a cap of {shown} impressions in {days:g} days"
        raise PolicyError(f"{history}: this history digest was made for {cap(*made)}, the rules of {spec.source} "
                          f"ask for {cap(*wanted)}; make it again with threefold history EVENTS --policies "
                          f"{spec.source} --out {history}.")
    return loaded


def _zone(recommender) -> str | None:
    return None if recommender.zone is None else str(recommender.zone)


_COMPILED: dict[tuple[str, str], PolicyTables] = {}


def staged_policies(staging: Path, digest: str, recommender) -> PolicyTables:
    """The job's compiled policies, once per process (Dask workers keep them between parts)."""
    key = (str(Path(staging).resolve()), digest)
    if key not in _COMPILED:
        folder = staging / _FOLDER
        saved = json.loads((folder / "rules.json").read_text())
        spec = read_policies(saved["rules"])
        catalog = pd.read_parquet(folder / "catalog.parquet") if (folder / "catalog.parquet").is_file() else None
        history = load_history(folder / "history.npz") if (folder / "history.npz").is_file() else None
        _COMPILED.clear()
        _COMPILED[key] = compile_policies(spec, catalog, model_items=recommender.item_labels, history=history)
    return _COMPILED[key]


def write_counts(staging: Path, index: int, counts: PolicyCounts) -> None:
    path = staging / _FOLDER / f"policy-counts-{index:05d}.json"
    temporary = path.with_name(f".{path.name}.tmp")
    temporary.write_text(json.dumps(counts.rules))
    os.replace(temporary, path)


def summed_counts(staging: Path) -> dict:
    """What each rule did over every part (for the manifest)."""
    total = PolicyCounts()
    for path in sorted((staging / _FOLDER).glob("policy-counts-*.json")):
        total.merge(json.loads(path.read_text()))
    return total.rules
