"""The `threefold` command end to end, in real processes (invented data only)."""

import shlex
import subprocess
from pathlib import Path
import sys

import pandas as pd
import pytest

from _tracking import child_env, threefold_command


def run(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "threefold.cli", *args], capture_output=True, text=True, cwd=cwd)


def test_validate_exits_zero_on_a_clean_log_and_one_on_errors(tmp_path):
    good = tmp_path / "good.csv"
    pd.DataFrame({"user_id": ["007", "010"], "item_id": ["a1", "a2"],
                  "timestamp": ["2026-03-02T07:15:03+00:00", "2026-03-02T07:16:03+00:00"]}).to_csv(good, index=False)
    result = run("validate", str(good))
    assert result.returncode == 0, result.stderr
    bad = tmp_path / "bad.csv"
    bad.write_text("user_id,item_id,timestamp\n007,a1,2026-03-02T07:15:03+00:00\n,a2,yesterday\n")
    result = run("validate", str(bad))
    assert result.returncode == 1
    assert "user_id" in result.stdout and "timestamp" in result.stdout


def test_missing_file_is_a_clear_error(tmp_path):
    result = run("validate", str(tmp_path / "nowhere.csv"))
    assert result.returncode == 1
    assert "threefold validate: error:" in result.stderr


def test_simulate_then_build_saves_a_loadable_tensor(tmp_path):
    assert run("simulate", str(tmp_path / "site"), "--events", "3000", "--seed", "4").returncode == 0
    result = run("build", str(tmp_path / "site" / "events.parquet"), str(tmp_path / "tensor"),
                 "--context", "daypart", "--context", "device*page_tone", "--timezone", "Europe/Berlin", "--w-skip", "3")
    assert result.returncode == 0, result.stderr
    assert "device*page_tone" in result.stdout
    from threefold.core.tensor_io import load_tensor

    tensor = load_tensor(tmp_path / "tensor")
    assert tensor.mode_names == ("user", "item", "daypart", "device*page_tone")
    assert tensor.weighting.w_skip == 3.0


@pytest.mark.parametrize("flag", ["--alpha=-1"])
def test_bad_parameter_values_are_refused_with_the_parameter_name(tmp_path, flag):
    assert run("simulate", str(tmp_path / "site"), "--events", "2000").returncode == 0
    result = run("build", str(tmp_path / "site" / "events.parquet"), str(tmp_path / "t"), flag)
    assert result.returncode == 1
    assert "The 'alpha' parameter of FeedbackWeighting must be a float in the range [0, inf)" in result.stderr


def test_demo_runs_end_to_end(tmp_path):
    result = run("demo", "--out", str(tmp_path / "demo"), "--events", "20000")
    assert result.returncode == 0, result.stderr[-2000:]
    for step in ("== 1.", "== 2.", "== 3.", "== 4.", "== 5.", "== 6.", "== 7.", "== 8."):
        assert step in result.stdout
    assert "models:/" in result.stdout  # logged models any MLflow client can load
    assert "structure selection for [models.cp_context]" in result.stdout and "chosen: " in result.stdout
    lists = pd.read_parquet(tmp_path / "demo" / "lists")  # the score job's parts (its _files skipped)
    assert {"rank", "item_id", "score", "reason_1", "reason_1_share", "status"} <= set(lists.columns)
    assert (tmp_path / "demo" / "lists" / "_manifest.json").is_file()
    assert "what each rule did" in result.stdout and "guardrail 'nothing upbeat beside a grave page'" in result.stdout
    assert "alpha_ndcg@10" in result.stdout and "pinned" in lists.columns  # the rules' cost and gain, paired
    assert "paired with the baseline" in result.stdout and " - mf: ndcg_true_at_10 " in result.stdout
    refreshed = pd.read_parquet(tmp_path / "demo" / "lists-refreshed")  # the same requests, refreshed model
    assert set(refreshed["request_id"]) == set(lists["request_id"])
    assert "items known only from the catalog" in result.stdout and "refreshed model written to" in result.stdout
    report = tmp_path / "demo" / "report"
    assert (report / "report.html").is_file() and (report / "report.json").is_file()
    logged = list((tmp_path / "demo" / "runs").rglob("explain/report.html"))  # artifacts of the model's run
    assert len(logged) == 1, logged
    assert "oracle" in result.stdout.split("== 8.")[1]  # the closed loop's table, oracle row included
    ending = result.stdout.split("== what to open and try next")[1]
    assert str(report / "report.html") in ending and "mlflow ui --backend-store-uri sqlite:///" in ending
    tries = [line.split("try   ", 1)[1] for line in ending.splitlines() if "try   " in line]
    for command in [t for t in tries if t.startswith(("threefold runs", "threefold score"))]:
        followed = run(*shlex.split(command)[1:])  # the suggested next commands work as printed
        assert followed.returncode == 0, (command, followed.stderr[-2000:])
    assert len(pd.read_parquet(tmp_path / "demo" / "lists-k5").groupby("request_id")) == lists["request_id"].nunique()


def test_models_lists_every_parameter_from_the_tables(tmp_path):
    """`threefold models` prints what a [models.NAME] table may hold, read from the parameter tables."""
    import json

    from threefold.models.registry import MODELS

    listing = run("models", "--json", cwd=tmp_path)
    assert listing.returncode == 0, listing.stderr
    tables = json.loads(listing.stdout)
    assert set(tables) == set(MODELS)
    for method, params in tables.items():
        assert [p["name"] for p in params] == list(MODELS[method].params.names)
    assert {p["name"]: p["default"] for p in tables["cp"]}["rank"] == 16
    text = run("models", "hooi", cwd=tmp_path)
    assert text.returncode == 0 and "rank = 8" in text.stdout and "callback" in text.stdout
    bad = run("models", "nope", cwd=tmp_path)
    assert bad.returncode == 1 and "Unknown model method 'nope'; methods are cp" in bad.stderr


def test_select_and_gain_on_the_sample_site(tmp_path):
    """`threefold select` and `threefold gain` on the committed sample log (invented site)."""
    import json
    from pathlib import Path

    config = str(Path(__file__).resolve().parents[1] / "experiments" / "quillfen-courier.toml")
    store = ["--store", str(tmp_path / "runs")]
    selected = run("select", config, "--set", "models.cp.structure=auto", "--json", *store, cwd=tmp_path)
    assert selected.returncode == 0, selected.stderr[-2000:]
    (selection,) = json.loads(selected.stdout)
    assert selection["model"] == "cp" and selection["candidates"][0]["candidate"] == "mf"
    assert selection["structure"] in {c["structure"] for c in selection["candidates"]}
    gain = run("gain", config, "--model", "cp", "--json", "--figure", str(tmp_path / "gain.png"), *store, cwd=tmp_path)
    assert gain.returncode == 0, gain.stderr[-2000:]
    report = json.loads(gain.stdout)
    assert [m["mode"] for m in report["modes"]] == ["daypart", "device"] and report["metric"] == "ndcg@10"
    assert (tmp_path / "gain.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    refused = run("select", config, *store, cwd=tmp_path)
    assert refused.returncode == 1 and "no CP model has structure = \"auto\"" in refused.stderr


FLOOD = """
import sys
from threefold import cli

def flood(args):  # more output than a pipe holds, so the reader's exit breaks the pipe mid-write
    for i in range(200_000):
        print("row", i, "x" * 40)
    return 0

cli.cmd_models = flood
sys.exit(cli.main(["models"]))
"""


def test_a_closed_pipe_ends_the_command_quietly(tmp_path):
    (tmp_path / "flood.py").write_text(FLOOD)
    piped = subprocess.run(["bash", "-c", f"set -o pipefail; {sys.executable} flood.py | head -1"], cwd=tmp_path,
                           env=child_env(), capture_output=True, text=True, timeout=300)
    assert piped.stdout == "row 0 " + "x" * 40 + "\n"
    assert "Traceback" not in piped.stderr and "BrokenPipeError" not in piped.stderr, piped.stderr[-2000:]
    assert piped.returncode == 141  # 128 + SIGPIPE, what a command killed by the closed pipe reports (common practice)


def test_help_imports_nothing_heavy():
    # `threefold --help` builds every parser without numpy, pandas, scipy or numba (the import cost,
    # not a wall-clock threshold: 0.09 s measured on the 2-core reference machine, against 1.4 s before)
    probe = ("import sys; from threefold import cli; cli._parser(); import threefold; "
             "heavy = sorted(m for m in ('numpy', 'pandas', 'scipy', 'numba', 'pyarrow', 'mlflow') if m in sys.modules); "
             "print(heavy)")
    result = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "[]"


def test_the_package_exports_load_on_first_use():
    import threefold

    assert set(threefold.__all__) - {"__version__"} == set(threefold._EXPORTS)
    from threefold.models.cp.model import fit_cp

    assert threefold.fit_cp is fit_cp
    with pytest.raises(AttributeError, match="has no attribute 'fit_cpp'"):
        threefold.fit_cpp


def test_compiled_kernels_are_cached_in_the_user_cache_not_the_source_tree(tmp_path):
    probe = ("import numpy as np, threefold, numba; from threefold.ranking.topk import top_k; "
             "top_k(np.arange(12.0).reshape(3, 4), 2); print(numba.config.CACHE_DIR)")
    env = child_env(XDG_CACHE_HOME=str(tmp_path / "cache"))
    env.pop("NUMBA_CACHE_DIR", None)
    result = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, env=env)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == str(tmp_path / "cache" / "threefold" / "numba")
    assert any((tmp_path / "cache" / "threefold" / "numba").rglob("*.nbi"))  # the kernels landed there


def test_every_option_of_every_command_has_help_text():
    import argparse

    from threefold import cli

    def silent(parser, path):
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):
                for name, sub in action.choices.items():
                    yield from silent(sub, [*path, name])
            elif not action.help:
                yield " ".join([*path, *(action.option_strings or [action.dest])])

    assert list(silent(cli._parser(), ["threefold"])) == []


def test_every_command_help_ends_with_an_example_and_the_top_help_with_the_cautions():
    # Issue 16: "every command has --help with an example"; cautions in the epilogue (common practice).
    import argparse

    from threefold import cli

    parser = cli._parser()
    top = parser.format_help()
    for phrase in ("personal data", "editors review", "controlled online test"):
        assert phrase in top
    commands = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    missing = [name for name, sub in commands.choices.items()
               if f"example:\n  threefold {name}" not in sub.format_help()]
    assert missing == []


@pytest.mark.parametrize("name", ["validate", "build", "models", "simulate"])
def test_the_help_examples_that_need_only_the_sample_run(name, tmp_path):
    # The example printed by --help is a command a newcomer can paste in a clone (paths relative to it).
    import shlex

    from threefold import cli

    repo = Path(__file__).resolve().parents[1]
    argv = shlex.split(cli.EXAMPLES[name])[1:]
    argv = [str(repo / a) if a.startswith("data_samples/") else a for a in argv]
    argv = [str(tmp_path / a) if a.endswith("/") else a for a in argv]
    result = subprocess.run(threefold_command(*argv), capture_output=True, text=True, cwd=tmp_path,
                            env=child_env(), timeout=600)
    assert result.returncode == 0, result.stderr


def test_a_first_run_says_the_kernels_compile_once_and_a_cached_run_says_nothing(tmp_path):
    # Issue 16: the first run sat silent while numba compiled; now one line says what happens and where it is cached.
    from threefold.core.kernel_cache import kernels_cached

    empty = tmp_path / "empty-cache"
    first = subprocess.run(threefold_command("score", str(tmp_path / "no-model"), "--requests", "r.csv", "--out",
                                             str(tmp_path / "o")), capture_output=True, text=True, cwd=tmp_path,
                           env=child_env(NUMBA_CACHE_DIR=str(empty)), timeout=300)
    assert "note: first run on this machine: the numerical kernels compile" in first.stderr
    assert str(empty) in first.stderr
    filled = tmp_path / "filled-cache"
    for name in ("cp_x/kernels.solve_rows-237.py311.nbi", "tucker_x/rows._rows_kernel-190.py311.nbi",
                 "ranking_x/topk._select_rows_parallel-322.py311.nbi"):
        (filled / name).parent.mkdir(parents=True, exist_ok=True)
        (filled / name).write_bytes(b"")
    assert kernels_cached(filled) and not kernels_cached(empty)
    later = subprocess.run(threefold_command("score", str(tmp_path / "no-model"), "--requests", "r.csv", "--out",
                                             str(tmp_path / "o")), capture_output=True, text=True, cwd=tmp_path,
                           env=child_env(NUMBA_CACHE_DIR=str(filled)), timeout=300)
    assert "first run" not in later.stderr and later.returncode == 1
    validate = subprocess.run(threefold_command("models", "cp"), capture_output=True, text=True, cwd=tmp_path,
                              env=child_env(NUMBA_CACHE_DIR=str(empty)), timeout=300)
    assert "first run" not in validate.stderr  # a command that compiles nothing says nothing
