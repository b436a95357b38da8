"""The ``threefold`` command: a thin layer over the Python API.

Flags carry the Python parameter names, with ``-`` for ``_`` (``--w-skip`` is
``w_skip``). Every command exits 0 on success, 1 when the data has errors, and
2 on a usage error.
"""

from __future__ import annotations

import argparse
import errno
import json
import sys
import time
import warnings
from pathlib import Path
from typing import Sequence

__all__ = ["main"]

#: Log rows of ``threefold demo --size``.
DEMO_SIZES = {"small": 200_000, "medium": 1_000_000}


def _add_weighting_flags(parser: argparse.ArgumentParser) -> None:
    group = parser.add_argument_group("feedback weighting (docs/feedback.md)")
    group.add_argument("--alpha", type=float, default=10.0, help="click confidence scale (default 10)")
    group.add_argument("--transform", choices=("log1p", "linear", "none"), default="log1p",
                       help="f in a clicked cell's confidence 1 + alpha * f(x): log1p, linear (x) or none (0) (default log1p)")
    group.add_argument("--signal", choices=("clicks", "dwell"), default="clicks",
                       help="the evidence x of a cell: its clicks, or its total dwell seconds (default clicks)")
    group.add_argument("--w-skip", dest="w_skip", type=float, default=2.0, help="confidence of each skip (default 2)")
    group.add_argument("--w0", type=float, default=0.1, help="weight of cells never shown (default 0.1; docs/models.md, section 9)")
    group.add_argument("--w0-scope", dest="w0_scope", choices=("cell", "pair"), default="cell",
                       help="w0 per unshown cell, or per (user, item) pair spread over its context cells")
    group.add_argument("--half-life-hours", dest="half_life_hours", type=float, default=None,
                       help="weight older events down with this half-life (default: no decay)")
    group.add_argument("--negatives", choices=("skip_above", "all_exposures", "none"), default="skip_above",
                       help="which unclicked impressions are skips: those above the lowest click of their request, "
                            "every one, or none (clicks only) (default skip_above; docs/feedback.md)")


def _weighting(args: argparse.Namespace):
    from threefold.core.feedback import FeedbackWeighting

    return FeedbackWeighting(
        alpha=args.alpha, transform=args.transform, signal=args.signal,
        w_skip=args.w_skip, w0=args.w0, w0_scope=args.w0_scope, half_life_hours=args.half_life_hours,
    )


_SAMPLE = "data_samples/quillfen-courier"

# One example per command, shown at the end of its --help (the sample paths exist in a clone).
EXAMPLES = {
    "validate": f"threefold validate {_SAMPLE}/events.parquet --items {_SAMPLE}/items.parquet",
    "simulate": "threefold simulate site/ --events 50000 --seed 3",
    "build": f"threefold build {_SAMPLE}/events.parquet tensor/ --context daypart --context device",
    "demo": "threefold demo --out threefold-demo --size small",
    "models": "threefold models cp",
    "train": "threefold train experiments/quillfen-courier.toml --set models.cp.rank=16",
    "sweep": "threefold sweep experiments/quillfen-courier.toml --workers 2",
    "select": "threefold select experiments/quillfen-courier.toml --model cp",
    "gain": "threefold gain experiments/quillfen-courier.toml --model cp --figure gain.png",
    "runs": "threefold runs --sort ndcg_at_10 --limit 10\n  threefold runs compare 3f9a1c 8b22d0",
    "score": "threefold score runs:/<run id>/model --requests requests.csv --k 10 --explain top3 --out lists/",
    "history": "threefold history events-30d.parquet --policies rules.toml --out history.npz",
    "refresh": "threefold refresh <run id> --events today.parquet --items items.parquet --out models/hourly",
    "explain": ("threefold explain --model <run id> --items items.parquet "
                "--compare device=mobile device=tablet --out report/"),
    "loop": "threefold loop --hours 72 --pure",
}

CAUTIONS = """\
cautions:
  - Event logs are personal data: pseudonymise user ids (--hash-user-ids-salt),
    keep retention short, and follow the data-protection law that applies where
    the site operates.
  - Guardrails, diversity and repetition rules change what readers see,
    sensitive stories included: have editors review them.
  - Offline metrics do not replace a controlled online test.
  More in README.md ("Cautions") and the docs/ folder."""


class _HelpFormatter(argparse.HelpFormatter):
    """Wraps each line of a description or epilog on its own and keeps indented lines (commands) as written."""

    def _fill_text(self, text, width, indent):
        lines = []
        for line in text.splitlines():
            if line.startswith("  "):
                lines.append(indent + line)
            else:
                lines.append(super()._fill_text(line, width, indent) if line else "")
        return "\n".join(lines)


def _finish_help(parser: argparse.ArgumentParser, name: str | None = None) -> None:
    """The same formatter for every (sub)command, and each command's example as its epilog."""
    parser.formatter_class = _HelpFormatter
    if name in EXAMPLES:
        parser.epilog = "example:\n  " + EXAMPLES[name]
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for sub_name, sub in action.choices.items():
                _finish_help(sub, sub_name if name is None else None)


def _parser() -> argparse.ArgumentParser:
    from threefold.core.defaults import EVENT_CHUNK_ROWS as DEFAULT_CHUNK_ROWS

    parser = argparse.ArgumentParser(
        prog="threefold",
        description="Context-aware recommendation from implicit feedback: logs to tensors, models, evaluation.",
        epilog=CAUTIONS,
    )
    parser.add_argument("--version", action="version", version=f"threefold {_version()}")
    parser.add_argument("--debug", action="store_true",
                        help="on an error, show the full traceback instead of the one-line message")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    validate = commands.add_parser("validate", help="check an event log (and items catalog) against the data contract")
    validate.add_argument("events", help="CSV file, Parquet file or folder of Parquet files")
    validate.add_argument("--items", help="items catalog to check and to check the log against")
    validate.add_argument("--timezone", help="IANA zone of timestamps written without a UTC offset")
    validate.add_argument("--chunk-rows", dest="chunk_rows", type=int, default=DEFAULT_CHUNK_ROWS,
                          help=f"rows read per chunk; memory grows with it, the report does not (default {DEFAULT_CHUNK_ROWS:,})")
    validate.add_argument("--strict", action="store_true", help="treat data-quality warnings as errors")
    validate.add_argument("--json", action="store_true", help="print the report as JSON")
    _add_allow_flag(validate)

    simulate = commands.add_parser("simulate", help="write the event log of an invented demo site")
    simulate.add_argument("out", help="output folder")
    simulate.add_argument("--events", dest="n_events", type=int, default=100_000, help="log rows (default 100,000)")
    simulate.add_argument("--seed", type=int, default=None, help="random seed (default: the scenario's)")
    simulate.add_argument("--format", dest="file_format", choices=("parquet", "csv"), default="parquet",
                          help="file format of the log and catalog (default parquet)")

    build = commands.add_parser("build", help="build and save the exposure-aware sparse tensor of a log")
    build.add_argument("events", help="event log: CSV file, Parquet file or folder of Parquet files")
    build.add_argument("out", help="tensor folder to write (a new version each time)")
    build.add_argument("--context", action="append", default=[], metavar="MODE",
                       help="context mode: 'daypart', 'week_part', a column, or columns crossed with '*' (repeatable)")
    build.add_argument("--timezone", default=None,
                       help="IANA zone of dayparts and of timestamps written without an offset (default: UTC dayparts; "
                            "zone-less timestamps are then errors)")
    build.add_argument("--daypart-starts", dest="daypart_starts", default=None,
                       help="comma-separated local start hours, e.g. 5,9,12,17,21")
    build.add_argument("--daypart-labels", dest="daypart_labels", default=None, help="comma-separated labels")
    build.add_argument("--hash-user-ids-salt", dest="hash_user_ids_salt", default=None,
                       help="replace user ids by salted hashes as they are read")
    build.add_argument("--position-propensity", dest="position_propensity", action="store_true",
                       help="estimate position propensities and weight clicks by their clipped inverse")
    _add_drop_flag(build)
    _add_weighting_flags(build)

    demo = commands.add_parser("demo", help="run the main job end to end on an invented demo site")
    demo.add_argument("--out", default="threefold-demo", help="working folder (default ./threefold-demo)")
    demo.add_argument("--size", choices=tuple(DEMO_SIZES), default="small",
                      help="small: 200,000 log rows, about 3 minutes on 2 cores with the first compile; medium: "
                           "1,000,000 rows, tighter intervals (default small)")
    demo.add_argument("--events", dest="n_events", type=int, default=None,
                      help="log rows to simulate, instead of --size")
    demo.add_argument("--seed", type=int, default=7, help="seed of the simulated site (default 7)")
    models = commands.add_parser(
        "models", help="list the model methods and their parameters (the keys of a [models.NAME] table)",
        description="Every model method with its parameters, defaults and meaning, read from the models' "
                    "parameter tables.",
    )
    models.add_argument("method", nargs="?", default=None, help="one method (default: all)")
    models.add_argument("--json", action="store_true", help="print the tables as JSON")
    _add_tracking_commands(commands)
    _add_score_command(commands)
    _add_history_command(commands)
    _add_refresh_command(commands)
    _add_explain_command(commands)
    _add_loop_command(commands)
    _finish_help(parser)
    return parser


def _add_store_flag(parser: argparse.ArgumentParser, default=None) -> None:
    parser.add_argument("--store", default=default, metavar="URI",
                        help="run store: a folder, sqlite:///FILE or a tracking server URI "
                             "(default: $MLFLOW_TRACKING_URI, else ./threefold-runs)")


def _add_tracking_commands(commands) -> None:
    """``train``, ``sweep`` and ``runs`` (docs/experiments.md)."""
    for name, text in (("train", "fit, evaluate and log every model of an experiment config"),
                       ("sweep", "search settings on Dask workers, selecting on the validation window"),
                       ("select", "choose the structure of every structure = \"auto\" CP model on the validation window"),
                       ("gain", "what each context mode adds to a model: the model against itself with the mode marginalized")):
        sub = commands.add_parser(name, help=text)
        sub.add_argument("config", help="experiment config (TOML)")
        sub.add_argument("--set", dest="overrides", action="append", default=[], metavar="SECTION.KEY=VALUE",
                         help="override a config value, e.g. --set models.cp.rank=8 (repeatable)")
        sub.add_argument("--unset", dest="unset", action="append", default=[], metavar="SECTION.KEY",
                         help="remove a key so its default applies, e.g. --set models.cp.method=hooi "
                              "--unset models.cp.structure (repeatable)")
        _add_store_flag(sub)
        if name == "train":
            sub.add_argument("--final", action="store_true",
                             help="after the evaluation, refit the factor models on every event and log them as "
                                  "the deployable models (child runs 'NAME final'; refresh them hourly)")
        if name == "gain":
            sub.add_argument("--model", required=True, metavar="NAME", help="the [models.NAME] to fit and report on")
            sub.add_argument("--stage", choices=("validation", "test"), default=None,
                             help="evaluation window (default: the config's [evaluation] stage)")
            sub.add_argument("--json", action="store_true", help="print the report as JSON")
            sub.add_argument("--figure", default=None, metavar="PNG", help="also draw the gains with their intervals")
        if name == "select":
            sub.add_argument("--model", action="append", default=[], metavar="NAME",
                             help="only this model (repeatable; default every \"auto\" model)")
            sub.add_argument("--json", action="store_true", help="print the selections as JSON")
            where = sub.add_mutually_exclusive_group()
            where.add_argument("--workers", type=int, default=None,
                               help="fit the candidates on a local Dask cluster of N processes")
            where.add_argument("--scheduler", default=None, metavar="ADDRESS",
                               help="fit the candidates on an existing Dask cluster, e.g. tcp://10.0.0.5:8786")
        if name == "sweep":
            sub.add_argument("--workers", type=int, default=2, help="local Dask worker processes (default 2)")
            sub.add_argument("--scheduler", default=None, metavar="ADDRESS",
                             help="use an existing Dask scheduler instead, e.g. tcp://10.0.0.5:8786")
    runs = commands.add_parser("runs", help="list logged runs; also: runs compare A B | runs cleanup | runs upgrade")
    _add_store_flag(runs)
    runs.add_argument("--experiment", default=None, help="only this experiment")
    runs.add_argument("--tag", action="append", default=[], metavar="KEY=VALUE", help="only runs with this tag")
    runs.add_argument("--sort", default=None, metavar="METRIC", help="sort by a metric (highest first)")
    runs.add_argument("--ascending", action="store_true", help="sort lowest first")
    runs.add_argument("--metric", action="append", default=[], help="metric column to show (repeatable)")
    runs.add_argument("--limit", type=int, default=50, help="at most this many runs, newest first (default 50)")
    runs.add_argument("--json", action="store_true", help="print JSON for machines")
    actions = runs.add_subparsers(dest="action", metavar="ACTION")
    compare = actions.add_parser("compare", help="parameter differences and metric deltas of two runs")
    compare.add_argument("run_a", help="run id or a prefix of at least 6 characters (the reference, A)")
    compare.add_argument("run_b", help="run id or prefix (B: deltas are B - A)")
    compare.add_argument("--json", action="store_true", default=argparse.SUPPRESS,
                         help="print the differences as JSON")
    _add_store_flag(compare, default=argparse.SUPPRESS)
    for name, text in (("cleanup", "mark runs whose process is gone as killed"),
                       ("upgrade", "back up the store's database, then migrate it to this MLflow's schema")):
        _add_store_flag(actions.add_parser(name, help=text), default=argparse.SUPPRESS)


def _add_score_command(commands) -> None:
    """``score`` (docs/scoring.md)."""
    from threefold.core.defaults import LIST_LENGTH as DEFAULT_K, SCORE_CHUNK_ROWS as DEFAULT_CHUNK_ROWS

    score = commands.add_parser(
        "score", help="ranked lists with reasons for a file of requests (resumable; on Dask with --workers)",
        description="Rank items for every request with a saved model and write part files plus a manifest "
                    "to OUT. Rerun the same command to resume a killed job.")
    score.add_argument("model", metavar="MODEL",
                       help="a model folder, a run id, or an MLflow model URI (runs:/<id>/model, models:/<name>/<version>)")
    score.add_argument("--requests", required=True,
                       help="CSV or Parquet: request_id, user_id, optional timestamp, k and context columns")
    score.add_argument("--candidates", default=None, help="CSV or Parquet: request_id, item_id (default: the live catalog)")
    score.add_argument("--k", type=int, default=DEFAULT_K, help=f"list length (default {DEFAULT_K}; a k column wins)")
    score.add_argument("--explain", choices=("none", "top3", "all"), default="none",
                       help="reason columns per ranked item (default none)")
    score.add_argument("--out", required=True, help="job folder: part files, then _manifest.json when done")
    score.add_argument("--format", choices=("parquet", "csv"), default="parquet", help="part files (default parquet)")
    score.add_argument("--chunk-rows", dest="chunk_rows", type=int, default=DEFAULT_CHUNK_ROWS,
                       help=f"requests per part (default {DEFAULT_CHUNK_ROWS:,})")
    score.add_argument("--explore", default="off", metavar="BETA|thompson",
                       help="exploration of items a refreshed model barely knows: an upper-confidence bonus "
                            "BETA*sqrt(q'Σq), or 'thompson' for a posterior sample (default off)")
    score.add_argument("--explore-slots", dest="explore_slots", type=int, default=1,
                       help="most items per list that exploration may bring in (default 1)")
    score.add_argument("--policies", default=None, metavar="RULES.toml",
                       help="list policies: guardrails, repetition, diversity, pins (docs/policies.md)")
    score.add_argument("--items", default=None, help="items catalog whose columns the policies name")
    score.add_argument("--history", default=None, metavar="EVENTS|DIGEST",
                       help="impression and click log for the repetition rules of --policies, or its digest "
                            "from threefold history (read once, reused by every job)")
    where = score.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, default=None, help="run the parts on a local Dask cluster of N processes")
    where.add_argument("--scheduler", default=None, metavar="ADDRESS",
                       help="run the parts on an existing Dask cluster, e.g. tcp://10.0.0.5:8786")
    _add_store_flag(score)


def _add_history_command(commands) -> None:
    """``history`` (docs/policies.md, "Repetition")."""
    history = commands.add_parser(
        "history", help="digest an impression and click log for the repetition rules (read once, used by every job)",
        description="Reduce an event log to what the [repetition] rules of RULES need (the pairs each user clicked, "
                    "the pairs shown as often as their cap allows without a click) and write it to OUT, for "
                    "threefold score --history OUT.")
    history.add_argument("events", metavar="EVENTS", help="CSV or Parquet log: user_id, item_id, timestamp, event")
    history.add_argument("--policies", required=True, metavar="RULES.toml",
                         help="the rules the digest serves (their frequency cap decides the window)")
    history.add_argument("--out", required=True, help="digest file to write (.npz)")
    history.add_argument("--timezone", default=None,
                         help="zone of timestamps written without an offset (default: such rows are skipped)")


def cmd_history(args: argparse.Namespace) -> int:
    from threefold.core.progress import progress
    from threefold.ranking._job_policies import history_for_rules
    from threefold.ranking.history import write_history
    from threefold.ranking.policy_spec import read_policies

    spec = read_policies(args.policies)
    if not spec.needs_history:
        raise ValueError(f"{args.policies}: the rules have no [repetition] section; they need no history.")
    with progress(None, "history", unit="rows") as bar:
        history = history_for_rules(args.events, spec, timezone=args.timezone, report=bar.update)
    write_history(history, args.out)
    cap = "" if history.cap_shown is None else (f", {history.ignored.size:,} pairs shown {history.cap_shown}+ times "
                                                 f"in {history.cap_days:g} days without a click")
    print(f"{history.rows:,} rows ({history.skipped:,} skipped): {history.clicked.size:,} clicked pairs{cap}: "
          f"{args.out}")
    return 0


def _add_refresh_command(commands) -> None:
    """``refresh`` (docs/refresh.md)."""
    refresh = commands.add_parser(
        "refresh", help="fold the events since a model's training cutoff into it: new items and users, no retrain",
        description="Read the events since MODEL's training cutoff, fold in new items (then users) with every "
                    "trained factor fixed, give catalog items without events a row from their attributes, and "
                    "write the result to OUT (a child run of the model's run when MODEL comes from the store).")
    refresh.add_argument("model", metavar="MODEL",
                         help="a model folder, a run id, or an MLflow model URI (as for threefold score)")
    refresh.add_argument("--events", required=True,
                         help="event log since the last full fit (older rows are counted and ignored)")
    refresh.add_argument("--items", default=None,
                         help="catalog: live times of new items; attribute rows for items without events")
    refresh.add_argument("--out", required=True, help="the refreshed model folder (a new version if it exists)")
    refresh.add_argument("--update-known", dest="update_known", action="store_true",
                         help="also re-solve trained rows with new events, around their trained values")
    refresh.add_argument("--metadata-prior", dest="metadata_prior", action="store_true",
                         help="solve items with an attribute row around it instead of around zero")
    refresh.add_argument("--json", action="store_true", help="print the counts as JSON")
    _add_drop_flag(refresh)
    _add_store_flag(refresh)


def cmd_refresh(args: argparse.Namespace) -> int:
    import json

    from threefold.pipeline.refresh import refresh_model

    store = None
    if not Path(args.model).is_dir() or args.store is not None:
        from threefold.tracking.store import open_store

        store = open_store(args.store)
    report = refresh_model(args.model, args.events, args.out, items=args.items, update_known=args.update_known,
                           metadata_prior=args.metadata_prior, store=store, errors=args.errors,
                           allow=args.allow)
    if args.json:
        print(json.dumps({"out": str(report.out), "counts": report.counts, "ignored_events": report.ignored_events,
                          "window": list(report.window), "seconds": report.seconds, "run_id": report.run_id,
                          "model_uri": report.model_uri}, indent=2))
    else:
        print(report.to_text())
    return 0


def _add_loop_command(commands) -> None:
    """``loop`` (docs/refresh.md, "Measured in a closed loop")."""
    from threefold.core.defaults import LOOP_POLICIES as POLICIES

    loop = commands.add_parser(
        "loop", help="replay the demo site's requests against refresh policies: each shows lists, the simulator clicks",
        description="Simulate the demo site, train one CP model on its first days, then replay the following hours "
                    "against each policy: it ranks the live items, the simulator's true click model draws the "
                    "clicks, and the policy learns from them (refresh every --step-hours, a nightly retrain, ...). "
                    "Prints true-relevance NDCG@10 and clicks per 1,000 impressions per policy.")
    loop.add_argument("--events", dest="n_events", type=int, default=100_000, help="log rows to simulate (default 100,000)")
    loop.add_argument("--days", type=int, default=6, help="days of the simulated log (default 6)")
    loop.add_argument("--train-days", dest="train_days", type=float, default=3.0,
                      help="days the first model is trained on (default 3)")
    loop.add_argument("--hours", type=int, default=72, help="hours replayed after them (default 72)")
    loop.add_argument("--step-hours", dest="step_hours", type=int, default=1, help="refresh period (default 1)")
    loop.add_argument("--policy", dest="policies", action="append", choices=POLICIES, default=None,
                      help="a policy to run (repeatable; default all)")
    loop.add_argument("--explore-beta", dest="explore_beta", type=float, default=0.5,
                      help="BETA of hourly+explore (default 0.5)")
    loop.add_argument("--pure", action="store_true",
                      help="the policy learns only from its own lists (default: the site's other traffic too)")
    loop.add_argument("--rank", type=int, default=24, help="CP rank (default 24)")
    loop.add_argument("--seed", type=int, default=7, help="seed of the site and of the clicks (default 7)")
    loop.add_argument("--out", default=None, metavar="CSV", help="also write the table to this CSV file")
    loop.add_argument("--json", action="store_true", help="print the table as JSON")


def cmd_loop(args: argparse.Namespace) -> int:
    from threefold.demo.loop import POLICIES, closed_loop
    from threefold.demo.simulate import ScenarioParameters, simulate_site

    for name, value in (("--events", args.n_events), ("--days", args.days), ("--hours", args.hours),
                        ("--step-hours", args.step_hours), ("--rank", args.rank)):
        if value < 1:
            raise ValueError(f"{name} must be at least 1, got {value}.")
    if not 0 < args.train_days < args.days:
        raise ValueError(f"--train-days must lie between 0 and --days ({args.days}), got {args.train_days:g}.")
    if args.explore_beta < 0:
        raise ValueError(f"--explore-beta must be non-negative, got {args.explore_beta:g}.")
    quiet = (lambda line: None) if args.json else print
    site = simulate_site(ScenarioParameters.scaled(args.n_events, days=args.days), random_state=args.seed)
    quiet(f"{site.params.site_name}: {len(site.events):,} log rows over {args.days} days, seed {args.seed}; "
          f"{'pure loop' if args.pure else 'beside the site traffic'}")
    result = closed_loop(site, train_days=args.train_days, hours=args.hours, step_hours=args.step_hours,
                         rank=args.rank, explore_beta=args.explore_beta, policies=args.policies or POLICIES,
                         seed=args.seed, shared_traffic=not args.pure, echo=quiet)
    if args.out:
        result.table.to_csv(args.out, index=False)
    print(result.table.to_json(orient="records", indent=2) if args.json else result.to_text())
    return 0


def _add_explain_command(commands) -> None:
    """``explain`` (docs/explain.md)."""
    explain = commands.add_parser(
        "explain", help="an HTML report of what each latent factor means and how context changes the lists",
        description="Write report.html (figures embedded), report.json and summary.txt to OUT and log them on the "
                    "model's run.")
    explain.add_argument("--model", required=True, metavar="MODEL",
                         help="a model folder, a run id, or an MLflow model URI (as for threefold score)")
    explain.add_argument("--items", default=None, help="CSV or Parquet catalog: item_id and attribute columns (labels)")
    explain.add_argument("--tensor", default=None, help="a tensor folder (threefold build) to refit on for stability")
    explain.add_argument("--seeds", type=int, default=2, help="refits with other seeds for stability (default 2)")
    explain.add_argument("--compare", nargs=2, action="append", default=[], metavar=("CONTEXT_A", "CONTEXT_B"),
                         help="two settings such as device=mobile device=tablet (repeatable; MODE=LEVEL[,MODE=LEVEL])")
    explain.add_argument("--user", default=None, metavar="USER_ID", help="compare this user's lists only")
    explain.add_argument("--segment", default=None, metavar="USERS",
                         help="compare these users' lists only: CSV or Parquet with a user_id column")
    explain.add_argument("--k", type=int, default=10, help="list length of the comparisons (default 10)")
    explain.add_argument("--top", type=int, default=10, help="top items and users per factor (default 10)")
    explain.add_argument("--out", required=True, help="folder for report.html, report.json, summary.txt")
    explain.add_argument("--json", action="store_true", help="print the report as JSON instead of the summary")
    _add_store_flag(explain)


def cmd_explain(args: argparse.Namespace) -> int:
    import json

    from threefold.pipeline.explain import explain_model

    store = None
    if not Path(args.model).is_dir():
        from threefold.tracking.store import open_store

        store = open_store(args.store)
    quiet = (lambda line: None) if args.json else print
    report = explain_model(args.model, out=args.out, items=args.items, tensor=args.tensor, seeds=args.seeds,
                           compare=[tuple(pair) for pair in args.compare], user=args.user, segment=args.segment,
                           k=args.k, n_top=args.top,
                           store=store, echo=quiet)
    if args.json:
        print(json.dumps(report.to_dict(), indent=2, default=float))
    return 0


def cmd_score(args: argparse.Namespace) -> int:
    from threefold.pipeline.score import score_requests

    manifest = score_requests(args.model, args.requests, out=args.out, candidates=args.candidates, k=args.k,
                              explain=args.explain, format=args.format, chunk_rows=args.chunk_rows,
                              workers=args.workers, scheduler=args.scheduler, store=args.store, load=False,
                              explore=args.explore, explore_slots=args.explore_slots, policies=args.policies,
                              items=args.items, history=args.history)
    print(f"{manifest['requests']:,} requests, {manifest['rows']:,} rows in {len(manifest['parts'])} part(s): "
          f"{Path(args.out) / '_manifest.json'}")
    rejected = manifest.get("rejected") or {}
    if rejected.get("requests"):
        print(f"warning: {rejected['requests']:,} request(s) not scored (a bad timestamp or k); each row with its "
              f"column and problem in {Path(args.out) / rejected['file']}", file=sys.stderr)
    if "policies" in manifest:
        from threefold.ranking.policies import PolicyCounts

        print("list policies:\n  " + PolicyCounts(manifest["policies"]).to_text().replace("\n", "\n  "))
    return 0


def cmd_train(args: argparse.Namespace) -> int:
    from threefold.pipeline.config import load_config, parse_overrides
    from threefold.demo.simulate import site_truth
    from threefold.pipeline.experiment import summary_text, train
    from threefold.tracking.store import open_store

    config = load_config(args.config, parse_overrides(args.overrides, args.unset))
    print(summary_text(train(config, open_store(args.store), truth=site_truth, final=args.final)))
    return 0


def cmd_select(args: argparse.Namespace) -> int:
    from threefold.demo.simulate import site_truth
    from threefold.pipeline.config import load_config, parse_overrides
    from threefold.pipeline.select import auto_models, select_and_log
    from threefold.tracking.store import open_store

    config = load_config(args.config, parse_overrides(args.overrides, args.unset))
    if not auto_models(config):
        raise ValueError(f"{args.config}: no CP model has structure = \"auto\"; set it in a [models.NAME] table "
                         "with method = \"cp\" (see docs/models.md, choosing a structure).")
    quiet = (lambda line: None) if args.json else print
    store = open_store(args.store)
    if args.workers is None and args.scheduler is None:
        _, selections = select_and_log(config, store, truth=site_truth, models=args.model, echo=quiet)
    else:
        from threefold.pipeline.cluster import dask_client

        with dask_client(args.workers, args.scheduler, owner="select") as client:
            _, selections = select_and_log(config, store, truth=site_truth, models=args.model, echo=quiet,
                                           client=client)
    if args.json:
        print(json.dumps([s.to_dict() for s in selections], indent=2, default=str))
    return 0


def cmd_gain(args: argparse.Namespace) -> int:
    from threefold.demo.simulate import site_truth
    from threefold.pipeline.config import load_config, parse_overrides
    from threefold.pipeline.context_report import fit_and_report

    config = load_config(args.config, parse_overrides(args.overrides, args.unset))
    quiet = (lambda line: None) if args.json else print
    report = fit_and_report(config, args.model, truth=site_truth, stage=args.stage, echo=quiet)
    print(json.dumps(report.to_dict(), indent=2, default=float) if args.json else report.to_text())
    if args.figure:
        report.figure(args.figure)
        if not args.json:
            print(f"figure: {args.figure}")
    return 0


def cmd_sweep(args: argparse.Namespace) -> int:
    from threefold.pipeline.config import load_config, parse_overrides
    from threefold.tracking.store import open_store
    from threefold.demo.simulate import site_truth
    from threefold.pipeline.sweep import sweep

    config = load_config(args.config, parse_overrides(args.overrides, args.unset))
    report = sweep(config, open_store(args.store), workers=args.workers, scheduler=args.scheduler, truth=site_truth)
    from threefold.core.text import frame_table

    print("\n".join(frame_table(report.trials)))
    print(f"best trial: {report.best_run_id or 'none finished'} (validation {report.metric}); "
          f"parent run {report.parent_run_id}")
    return 0


def cmd_models(args: argparse.Namespace) -> int:
    from threefold.models.registry import MODELS, param_table

    methods = [args.method] if args.method else list(MODELS)
    tables = {m: param_table(m) for m in methods}  # an unknown method is a clear error naming the methods
    if args.json:
        print(json.dumps({m: [{"name": p.name, "default": p.default, "help": p.doc,
                               "configurable": p.config_rule is not None} for p in table]
                          for m, table in tables.items()}, indent=2, default=str))
        return 0
    for method, table in tables.items():
        print(f"[models.NAME] method = \"{method}\"   ({table.owner})")
        for line in table.help_lines():
            print(f"    {line}")
        print()
    return 0


def cmd_runs(args: argparse.Namespace) -> int:
    from threefold.tracking import runs as listing
    from threefold.tracking.store import open_store, upgrade_store

    if args.action == "upgrade":
        backup = upgrade_store(args.store)
        print("the store is already current" if backup is None else f"backed up to {backup}; store migrated")
        return 0
    store = open_store(args.store)
    from threefold.tracking.store import cleanup_line

    for run_id, reason in store.reap_stale_runs():
        print(cleanup_line(run_id, reason), file=sys.stderr if args.json else sys.stdout)
    if args.action == "cleanup":
        return 0
    if args.action == "compare":
        comparison = listing.compare_runs(store, args.run_a, args.run_b)
        print(json.dumps(comparison, indent=2) if args.json else listing.format_comparison(comparison))
        return 0
    tags = dict(t.split("=", 1) for t in args.tag if "=" in t)
    found = listing.list_runs(store, experiment=args.experiment, tags=tags, sort=args.sort,
                              ascending=args.ascending, limit=args.limit)
    print(json.dumps(found, indent=2) if args.json else listing.format_runs(found, args.metric or None))
    return 0


def _version() -> str:
    from threefold import __version__

    return __version__


def _add_drop_flag(command) -> None:
    command.add_argument("--drop-bad-rows", dest="errors", action="store_const", const="drop", default="raise",
                         help="drop the rows `threefold validate` reports as errors (and clear bad values), listing "
                              "what was dropped; without it such a log is refused")
    _add_allow_flag(command)


def _add_allow_flag(command) -> None:
    from threefold.core.defaults import SUSPICIOUS_CODES

    command.add_argument("--allow", dest="allow", action="append", default=[], choices=SUSPICIOUS_CODES,
                         metavar="CODE",
                         help="accept a suspicious pattern that is an error otherwise (repeatable): case_variant_id "
                              "(ids that differ only in letter case, 'A12' and 'a12', as two items) or "
                              "outlying_timestamp (days far outside the bulk of the log)")


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    print(f"warning: {message}", file=sys.stderr)


def _print_warnings(caught: list) -> None:
    for w in caught:
        print(f"warning: {w.message}", file=sys.stderr)


def cmd_validate(args: argparse.Namespace) -> int:
    from threefold.data.validate import validate_events

    report = validate_events(args.events, items=args.items, timezone=args.timezone,
                             chunk_rows=args.chunk_rows, strict=args.strict,
                             allow=args.allow)
    print(json.dumps(report.to_dict(), indent=2) if args.json else report.to_text())
    return 0 if report.ok else 1


def cmd_simulate(args: argparse.Namespace) -> int:
    from threefold.demo.simulate import simulate_site, write_site

    started = time.perf_counter()
    site = simulate_site(n_events=args.n_events, random_state=args.seed)
    out = write_site(site, args.out, file_format=args.file_format)
    clicks = int((site.events["event"] == "click").sum())
    print(f"{site.params.site_name}: {len(site.events):,} events ({clicks:,} clicks), "
          f"{site.params.n_users:,} users, {len(site.items):,} items, seed {site.params.seed}")
    print(f"written to {out} in {time.perf_counter() - started:.1f} s")
    return 0


def _contexts(names: Sequence[str], timezone: str, starts: str | None, labels: str | None):
    from threefold.data.context import DEFAULT_DAYPART_LABELS, DEFAULT_DAYPART_STARTS, parse_context

    day_starts = tuple(float(x) for x in starts.split(",")) if starts else DEFAULT_DAYPART_STARTS
    day_labels = tuple(x.strip() for x in labels.split(",")) if labels else DEFAULT_DAYPART_LABELS
    return [parse_context(n, timezone=timezone, daypart_starts=day_starts, daypart_labels=day_labels) for n in names]


def _print_tensor_summary(tensor, report, propensity) -> None:
    print(f"tensor: {tensor}  ({tensor.nbytes / max(tensor.nnz, 1):.0f} bytes per stored cell)")
    print(f"  rows in {report.rows_in:,}; clicks {report.clicks:,}; impressions {report.impressions:,}; "
          f"skips {report.negatives:,}" + (f"; dropped while building {report.dropped}" if report.dropped else ""))
    for name, vocab in zip(tensor.mode_names[2:], tensor.vocabularies[2:]):
        print(f"  context mode {name}: {', '.join(vocab.labels)}")
    if propensity is not None:
        ratios = ", ".join(f"{r:.2f}" for r in propensity.ratios)
        print(f"  examination by position relative to position 1: {ratios}")


def cmd_build(args: argparse.Namespace) -> int:
    from threefold.core.tensor_io import save_tensor
    from threefold.pipeline.prepare import build_from_log

    contexts = _contexts(args.context, args.timezone or "UTC", args.daypart_starts, args.daypart_labels)
    tensor, report, propensity, validation, caught = build_from_log(
        args.events, contexts, _weighting(args), negatives=args.negatives, timezone=args.timezone,
        salt=args.hash_user_ids_salt, position_propensity=args.position_propensity, errors=args.errors,
        allow=args.allow,
    )
    _print_warnings(caught)
    folder = save_tensor(tensor, args.out, extra={"build_report": report.to_dict(),
                                                  "propensity": None if propensity is None else propensity.to_dict()})
    _print_tensor_summary(tensor, report, propensity)
    print(f"saved to {folder}")
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    from threefold.data.context import Daypart, ColumnContext
    from threefold.core.feedback import FeedbackWeighting
    from threefold.demo.reading import plain_reading
    from threefold.demo.simulate import simulate_site, site_truth, write_site
    from threefold.pipeline.config import load_config
    from threefold.pipeline.experiment import summary_text, train
    from threefold.tracking.store import open_store
    from threefold.core.tensor_io import save_tensor
    from threefold.pipeline.prepare import build_from_log

    out = Path(args.out)
    if args.n_events is None:
        args.n_events = DEMO_SIZES[args.size]
    print(f"== 1. simulate an invented site ({args.n_events:,} log rows, seed {args.seed})")
    site = simulate_site(n_events=args.n_events, random_state=args.seed)
    log_dir = write_site(site, out / "site")
    print(f"   {site.params.site_name}: {site.params.n_users:,} users, {len(site.items):,} items -> {log_dir}")

    print("== 2. validate the log against the data contract (read once, for steps 2 and 3)")
    p = site.params
    contexts = [Daypart(timezone=p.timezone, starts=tuple(float(s) for s in p.daypart_starts), labels=p.daypart_labels),
                ColumnContext("device"), ColumnContext("page_tone")]
    tensor, build_report, propensity, validation, caught = build_from_log(
        log_dir / "events.parquet", contexts, FeedbackWeighting(), negatives="skip_above", timezone=p.timezone,
        items=log_dir / "items.parquet")
    _print_warnings(caught)
    print("   " + validation.to_text().replace("\n", "\n   "))
    if not validation.ok:
        return 1

    print("== 3. build the exposure-aware user x item x context tensor")
    _print_tensor_summary(tensor, build_report, propensity)
    planted = ", ".join(f"{r:.2f}" for r in site.examination / site.examination[0])
    print(f"  planted examination (the simulator's truth):            {planted}")
    folder = save_tensor(tensor, out / "tensor", extra={"build_report": build_report.to_dict()})
    print(f"   saved to {folder}")

    print("== 4. train, evaluate and track: popularity, context-free MF, a CP structure chosen on the validation\n"
          "      window (structure = \"auto\": MF unless a context structure wins), implicit Tucker")
    config_path = _write_demo_config(out, log_dir, site)
    print(f"   config {config_path}; run store {out / 'runs'}")
    config = load_config(config_path)
    store = open_store(str(out / "runs"))
    report = train(config, store, echo=lambda line: print(f"   {line}"), truth=site_truth)
    print(summary_text(report))
    print("\n".join(plain_reading(report)))
    print(f"   list the runs: threefold runs --store {out / 'runs'}")
    run = _demo_score(out, log_dir, report, store, site)
    if run is not None:
        _demo_refresh(out, log_dir, run, store)
        _demo_explain(out, log_dir, run, store, out / "tensor")
    _demo_loop(site)
    _demo_next(out, config_path, run)
    return 0


def _demo_next(out: Path, config_path: Path, run) -> None:
    """The end of the demo: the files it wrote worth opening, and the commands to try next."""
    store = out / "runs"
    files = [(out / "report" / "report.html", "the factor report: what each factor means, how context moves the lists"),
             (out / "lists", "the scored lists: Parquet parts, _manifest.json (rule counts), _rejected.parquet"),
             (config_path, "the experiment config the demo trained from: edit it and train again"),
             (out / "site", "the invented site's log and catalog, in the format of docs/data-format.md")]
    print("== what to open and try next")
    for path, what in files:
        if path.exists():
            print(f"   open  {path}\n         {what}")
    commands = [f"threefold runs --store {store}",
                f"mlflow ui --backend-store-uri sqlite:///{(store / 'mlflow.db').absolute()}"
                "   (the run store in a browser, http://127.0.0.1:5000)",
                f"threefold train {config_path} --store {store} --set evaluation.stage=validation"]
    if run is not None:
        commands.append(f"threefold score {run.run_id} --requests {out / 'requests.parquet'} --k 5 --out "
                        f"{out / 'lists-k5'} --store {store}")
    for command in commands:
        print(f"   try   {command}")


def _demo_loop(site) -> None:
    """Step 8: the refresh policies in a closed loop over the log's last day but one."""
    from threefold.demo.loop import closed_loop

    policies = ("stale", "hourly", "hourly+metadata", "oracle")
    print("== 8. what refreshing buys: replay a day against the simulator's true click model, each policy learning "
          "from what it showed")
    print(f"   threefold loop --events {len(site.events)} --days {site.params.days} --train-days "
          f"{site.params.days - 2} --hours 24 " + " ".join(f"--policy {p}" for p in policies))
    result = closed_loop(site, train_days=site.params.days - 2, hours=24, policies=policies,
                         seed=site.params.seed, echo=lambda line: None, show_progress=False)
    print("   " + result.to_text().replace("\n", "\n   "))
    print("   the full comparison (nightly retrain, exploration, a pure loop): threefold loop; docs/refresh.md")


def _demo_refresh(out: Path, log_dir: Path, run, store) -> None:
    """Step 6: the hourly refresh: fold the events since the training cutoff into the model, score again."""
    import pandas as pd

    from threefold.pipeline.refresh import refresh_model
    from threefold.pipeline.score import score_requests

    events = pd.read_parquet(log_dir / "events.parquet")
    end = int(events["timestamp"].max())
    since = events[events["timestamp"] < end - 86_400]  # every event up to the last day: the day before it is new
    since_path = out / "events-until-last-day.parquet"
    since.to_parquet(since_path, index=False)
    print(f"== 6. refresh {run.name!r} with the events since its training cutoff (up to the last day), "
          "catalog items without events from their attributes")
    print(f"   threefold refresh {run.run_id} --events {since_path} --items {log_dir / 'items.parquet'} "
          f"--out {out / 'refreshed'} --store {out / 'runs'}")
    report = refresh_model(run.run_id, since_path, out / "refreshed", items=log_dir / "items.parquet", store=store)
    print("   " + report.to_text().replace("\n", "\n   "))
    lists = score_requests(out / "refreshed", out / "requests.parquet", out=out / "lists-refreshed", k=10,
                           show_progress=False)
    stale = pd.read_parquet(out / "lists")
    fresh_items = set(lists["item_id"].dropna()) - set(stale["item_id"].dropna())
    share = lists["item_id"].isin(fresh_items).mean()
    cold = (lists["item_status"] == "from_metadata").mean()
    print(f"   the same requests scored with it: {100 * share:.1f}% of the slots go to items the stale model "
          f"never listed, {100 * cold:.1f}% to items known only from the catalog (item_status from_metadata); "
          f"lists in {out / 'lists-refreshed'} (docs/refresh.md)")


def _demo_explain(out: Path, log_dir: Path, run, store, tensor_folder: Path) -> None:
    """Step 7: the factor report of the scored model, for the editors."""
    from threefold.pipeline.explain import explain_model

    report_dir = out / "report"
    compare = [("daypart=morning,device=mobile", "daypart=evening,device=tablet")]
    print(f"== 7. explain {run.name!r}: what each factor means and what changes from a mobile morning to a tablet "
          "evening")
    print(f"   threefold explain --model {run.run_id} --items {log_dir / 'items.parquet'} --tensor {tensor_folder} "
          f"--seeds 1 --compare {compare[0][0]} {compare[0][1]} --out {report_dir} --store {out / 'runs'}")
    lines: list[str] = []
    explain_model(run.run_id, out=report_dir, items=log_dir / "items.parquet", tensor=tensor_folder, seeds=1,
                  compare=compare, store=store, echo=lines.append)
    text = "\n".join(lines).splitlines()
    factors = [line.strip() for line in text if line.strip().startswith("component") and "[user*item]" not in line
               and "no enriched attribute" not in line]  # the context factors the catalog can name
    changes = [line.strip() for line in text if line.strip().startswith(("top-", "rise most", "fall most", "driven"))]
    stability = [line.strip() for line in text if line.startswith("stability:")]
    for line in factors[:4] + changes + stability:
        print(f"   {line}")
    print(f"   open {report_dir / 'report.html'} (also logged as artifacts explain/ of run {run.run_id})")


def _demo_score(out: Path, log_dir: Path, report, store, site):
    """Step 5: the nightly job on the last day's requests, under editorial rules, with reasons; returns the run."""
    import json

    import pandas as pd

    from threefold.demo.policies import demo_rules, true_effect
    from threefold.pipeline.score import score_requests
    from threefold.ranking.policies import PolicyCounts

    scored = [r for r in report.runs if r.model_uri and r.name != "mf"] or [r for r in report.runs if r.model_uri]
    if not scored:
        return None
    run = scored[0]
    events = pd.read_parquet(log_dir / "events.parquet", columns=["request_id", "user_id", "timestamp", "device",
                                                                  "page_tone"])
    last_day = events[events["timestamp"] >= events["timestamp"].max() - 86_400]
    requests = last_day.drop_duplicates("request_id").head(2_000)
    requests_path = out / "requests.parquet"
    requests.to_parquet(requests_path, index=False)
    rules = out / "policies.toml"
    rules.write_text(demo_rules(site))
    history = out / "history.parquet"  # what readers saw and clicked before the scored day (repetition rules)
    log = pd.read_parquet(log_dir / "events.parquet")
    log[log["timestamp"] < requests["timestamp"].min()].to_parquet(history, index=False)
    print(f"== 5. score {len(requests):,} requests of the last day with {run.name!r}: top 10 with reasons, under "
          f"the editorial rules of {rules}")
    print(f"   threefold score {run.run_id} --requests {requests_path} --k 10 --explain top3 --policies {rules} "
          f"--items {log_dir / 'items.parquet'} --history {history} --out {out / 'lists'} "
          f"--store {out / 'runs'}")
    lists = score_requests(run.run_id, requests_path, out=out / "lists", k=10, explain="top3", store=store,
                           show_progress=False, policies=rules, items=log_dir / "items.parquet",
                           history=history)
    manifest = json.loads((out / "lists" / "_manifest.json").read_text())
    print("   what each rule did:\n     " + PolicyCounts(manifest["policies"]).to_text().replace("\n", "\n     "))
    plain = score_requests(run.run_id, requests_path, out=out / "lists-without-rules", k=10, store=store,
                           show_progress=False)
    effect = true_effect(site, requests, plain, lists)
    print("   what the rules cost and buy, against the simulator's true relevance (paired per user, 95% interval):")
    for row in effect.itertuples():
        print(f"     {row.measure:<17} without {row.without:.4f}  with {row.with_rules:.4f}  "
              f"difference {row.difference:+.4f} [{row.low:+.4f}, {row.high:+.4f}]")
    first = lists[lists["request_id"] == lists["request_id"].iloc[0]].head(3)
    columns = ["rank", "item_id", "score", "daypart", "device", "page_tone", "status", "reason_1", "reason_1_share"]
    print("   " + first[[c for c in columns if c in first.columns]].to_string(index=False).replace("\n", "\n   "))
    print(f"   {lists['request_id'].nunique():,} lists, {len(lists):,} rows in {out / 'lists'} "
          "(a rerun of the same command resumes; see docs/scoring.md)")
    return run


def _write_demo_config(out: Path, log_dir: Path, site) -> Path:
    """The demo's experiment config: last two days for test, the two days before for validation."""
    import tomllib

    from threefold.demo.policies import demo_rules
    from threefold.pipeline.config import to_toml

    end = int(site.events["timestamp"].max())
    cutoff = end - 2 * 86_400
    p = site.params
    sections = {
        "experiment": {"name": "demo", "tags": {"scenario": "demo"}},
        "data": {"events": str((log_dir / "events.parquet").resolve()), "items": str((log_dir / "items.parquet").resolve()),
                 "timezone": p.timezone},
        "build": {"contexts": ["daypart", "device", "page_tone"], "negatives": "skip_above",
                  "daypart_starts": [float(x) for x in p.daypart_starts], "daypart_labels": list(p.daypart_labels)},
        "weighting": {"alpha": 10.0, "w_skip": 2.0, "w0": 0.1},
        "split": {"cutoff": int(cutoff), "validation_window": "48h"},
        "evaluation": {"ks": [3, 5, 10], "baseline": "mf", "metrics": ["recall", "ndcg", "ndcg_true"],
                       "n_resamples": 200, "random_state": 0, "policy_ablation": True},
        "models": {
            "popularity": {"method": "popularity", "window": "24h"},
            "mf": {"method": "cp", "structure": "user*item", "rank": 16, "reg": 0.1, "max_sweeps": 10,
                   "random_state": 1},
            "cp_context": {"method": "cp", "rank": 16, "reg": 0.1, "max_sweeps": 10, "random_state": 1,
                           "structure": "auto"},  # chosen on the validation window: MF unless context wins
            "tucker": {"method": "implicit_tucker", "rank": [8, 8, 3, 2, 2], "reg": 0.1, "max_sweeps": 5,
                       "random_state": 1},
        },
        "policies": tomllib.loads(demo_rules(site)),  # each model is also measured after the editorial rules
    }
    path = out / "demo.toml"
    path.write_text(to_toml(sections))
    return path


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``threefold`` console command."""
    from threefold.pipeline.cluster import SchedulerUnreachable

    args = _parser().parse_args(argv)
    import io
    import os

    # MLflow's schema-creation chatter is not for our users; its warnings and errors still show
    # (MLflow's own setting, read when MLflow is imported; a user's explicit choice wins).
    os.environ.setdefault("MLFLOW_LOGGING_LEVEL", "WARNING")
    # threefold draws its own progress (threefold.core.progress); MLflow's download bars would interleave with it
    os.environ.setdefault("MLFLOW_ENABLE_ARTIFACTS_PROGRESS_BAR", "false")
    handlers = {"validate": cmd_validate, "simulate": cmd_simulate, "build": cmd_build, "demo": cmd_demo,
                "train": cmd_train, "sweep": cmd_sweep, "runs": cmd_runs, "models": cmd_models, "score": cmd_score,
                "history": cmd_history, "select": cmd_select, "gain": cmd_gain, "explain": cmd_explain, "refresh": cmd_refresh,
                "loop": cmd_loop}
    from threefold.core.kernel_cache import first_run_notice

    notice = first_run_notice(args.command)
    if notice:
        print(f"note: {notice}", file=sys.stderr)
    try:
        with warnings.catch_warnings():
            warnings.showwarning = _show_warning  # one line each, as the commands print their own warnings
            return handlers[args.command](args)
    except BrokenPipeError:  # the reader went away (| head): stop quietly, as a command killed by SIGPIPE would
        try:
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())  # nothing left to flush at exit
        except (OSError, ValueError, AttributeError, io.UnsupportedOperation):  # stdout is no file (embedded use)
            pass
        return 141
    except (ValueError, KeyError, FileNotFoundError, MemoryError, SchedulerUnreachable) as error:
        if args.debug:
            raise
        message = error.args[0] if isinstance(error, KeyError) and error.args else error
        print(f"threefold {args.command}: error: {message}", file=sys.stderr)
        return 1
    except OSError as error:
        if args.debug or error.errno not in (errno.ENOSPC, errno.EDQUOT):
            raise
        print(f"threefold {args.command}: error: no space left on the device ({error.filename or error}); the "
              "outputs of earlier runs are intact (a folder is switched to a new version only once it is complete). "
              "Free some space and run the command again.", file=sys.stderr)
        return 1


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
