"""The factor report (threefold.explain.report): one self-contained HTML file, JSON and a terminal summary."""

from __future__ import annotations

import base64
import json
import os
import shutil
import subprocess
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pytest

from threefold.core.tensor import SparseTensor
from threefold.explain.compare import compare_contexts
from threefold.explain.report import build_report
from threefold.models.tucker.hooi import fit_hooi

from _tracking import tiny_cp


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.images, self.captions, self.headings, self._in = [], 0, [], None

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "img":
            self.images.append(attrs)
        if tag == "figcaption":
            self.captions += 1
        if tag in ("h1", "h2"):
            self._in = tag

    def handle_data(self, data):
        if self._in:
            self.headings.append(data)
            self._in = None


def _catalog(result):
    labels = result.vocabularies[1].labels
    return pd.DataFrame({"item_id": list(labels), "shelf": (["north", "south", "east"] * len(labels))[: len(labels)],
                         "format": (["brief", "feature"] * len(labels))[: len(labels)]})


def _read(path):
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    return page


def test_cp_report_is_one_file_with_every_image_embedded_and_captioned(tmp_path):
    result, _ = tiny_cp(seed=2, structure="user*item:2 + user*item*daypart:2 + item*device:1")
    comparison = compare_contexts(result, np.arange(result.shape[0]), [0, 0], [2, 1], k=3,
                                  label_a="daypart=0, device=0", label_b="daypart=2, device=1")
    report = build_report(result, title="tiny model", catalog=_catalog(result), n_top=3, comparisons=[comparison])
    path = report.write(tmp_path / "out")
    assert sorted(p.name for p in (tmp_path / "out").iterdir()) == ["report.html", "report.json", "summary.txt"]
    page = _read(path)
    assert page.images and page.captions == len(page.images)
    for image in page.images:
        assert image["src"].startswith("data:image/png;base64,")
        assert base64.b64decode(image["src"].split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature
        assert image["title"] and image["alt"]
    assert {"The factors", "The context modes", "Model diagnostics", "Context comparisons"} <= set(page.headings)
    data = json.loads((tmp_path / "out" / "report.json").read_text())
    assert len(data["factors"]) == 5 and data["comparisons"][0]["k"] == 3
    assert "shelf" in (tmp_path / "out" / "summary.txt").read_text() or "no enriched attribute" in report.to_text()


def test_labels_come_from_the_catalog_columns_given(tmp_path):
    """Column names unlike the demo's: a factor whose top items all share one shelf is labelled by it."""
    result, _ = tiny_cp(seed=2, structure="user*item*daypart:1")
    first = build_report(result, n_top=4).factors[0]
    catalog = _catalog(result)
    catalog["shelf"] = "west"
    catalog.loc[catalog.index.isin(first.top_items), "shelf"] = "attic"
    labelled = build_report(result, catalog=catalog, n_top=4).factors[0]
    assert "shelf=attic" in labelled.label


def test_tucker_report_has_core_slices(tmp_path):
    rng = np.random.default_rng(0)
    data = rng.random((8, 7, 3, 2)) * (rng.random((8, 7, 3, 2)) < 0.5)
    result = fit_hooi(SparseTensor.from_dense(data), rank=(3, 3, 2, 2), random_state=0)
    page = _read(build_report(result, title="tucker").write(tmp_path))
    assert "Tucker core slices" in page.headings and page.captions == len(page.images) > 0


def test_a_catalog_without_item_ids_is_refused():
    result, _ = tiny_cp(seed=2)
    with pytest.raises(ValueError, match=r"the catalog has no item_id column; it has \['id'\]"):
        build_report(result, catalog=pd.DataFrame({"id": ["x"]}))


def _chromium():
    return next((shutil.which(n) for n in ("chromium", "chromium-browser", "google-chrome") if shutil.which(n)), None)


@pytest.mark.skipif(_chromium() is None, reason="headless Chromium is not installed (Debian package 'chromium'; "
                                                "CI installs it in .ci/run)")
def test_the_report_opens_in_headless_chromium_with_every_image_loaded(tmp_path):
    """Headless Chromium (Debian's package) renders the page; a script counts images that failed to decode."""
    result, _ = tiny_cp(seed=2, structure="user*item:2 + user*item*daypart:2")
    path = build_report(result, title="browser check", catalog=_catalog(result), n_top=3).write(tmp_path)
    probe = tmp_path / "probe.html"
    html = path.read_text(encoding="utf-8").replace(
        "</body>", "<script>window.onload=function(){var b=0,n=document.images.length;"
                   "for(var i=0;i<n;i++){if(!document.images[i].complete||document.images[i].naturalWidth===0)b++;}"
                   "document.title='images '+n+' broken '+b;};</script></body>")
    probe.write_text(html, encoding="utf-8")
    run = subprocess.run([_chromium(), "--headless", "--no-sandbox", "--disable-gpu", "--virtual-time-budget=5000",
                          "--dump-dom", probe.as_uri()], capture_output=True, text=True, timeout=120,
                         env={**os.environ, "HOME": str(tmp_path)})
    assert run.returncode == 0, run.stderr[-2000:]
    import re

    found = re.search(r"<title>images (\d+) broken (\d+)</title>", run.stdout)
    assert found, run.stdout[:500]
    assert int(found.group(1)) > 0 and int(found.group(2)) == 0
    assert "Uncaught" not in run.stderr


def test_explain_command_writes_the_report_from_a_model_folder(tmp_path):
    """`threefold explain` in a real process: a saved model folder, a catalog file, a tensor for stability and a
    comparison; bad settings end in one message naming the mode and its levels."""
    import sys

    from threefold.core.tensor_io import save_tensor
    from threefold.data.build import build_tensor
    from threefold.data.context import parse_context
    from threefold.models.model_io import save_model

    from _tracking import tiny_events

    specs = [parse_context("daypart"), parse_context("device")]
    tensor, _ = build_tensor(tiny_events(1), specs, negatives="none", dtype=np.float64)
    spec = {"method": "cp", "structure": "user*item*daypart*device:2", "rank": 2, "max_sweeps": 3, "tol": 0.0,
            "random_state": 1}
    from threefold.pipeline.stages import make_estimator

    result = make_estimator(spec).fit(tensor).result_
    save_model(result, tmp_path / "model", parameters=spec, extra={"name": "tiny"})
    folder = tmp_path / "model"
    save_tensor(tensor, tmp_path / "tensor")
    _catalog(result).to_csv(tmp_path / "items.csv", index=False)
    device = [str(x) for x in result.vocabularies[3].labels]
    command = [sys.executable, "-m", "threefold.cli", "explain", "--model", str(folder), "--items",
               str(tmp_path / "items.csv"), "--tensor", str(tmp_path / "tensor"), "--seeds", "1",
               "--compare", f"device={device[0]}", f"device={device[1]}", "--out", str(tmp_path / "report")]
    done = subprocess.run(command, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr[-2000:]
    assert "core consistency (CORCONDIA)" in done.stdout and f"device={device[0]}  vs  device={device[1]}" in done.stdout
    assert (tmp_path / "report" / "report.html").is_file()
    bad = subprocess.run(command[:-5] + ["--compare", "device=nowhere", f"device={device[1]}", "--out",
                                         str(tmp_path / "r2")], capture_output=True, text=True)
    assert bad.returncode == 1
    assert f"--compare 'device=nowhere': device has no level 'nowhere'; its levels are {device}" in bad.stderr


def test_the_recorded_context_gain_is_the_first_section(tmp_path):
    """A context-gain report read back from its JSON (as train logs it) opens the page, text and figure."""
    from threefold.evaluation.context_gain import ContextGain

    gain = ContextGain(model="tiny", metric="ndcg@10", full=0.31, stage="test", table=pd.DataFrame(
        {"mode": ["daypart"], "marginalized": [0.29], "gain": [0.02], "low": [0.01], "high": [0.03],
         "relative": [0.069], "relative_low": [0.034], "relative_high": [0.103], "p_value": [0.01], "n_users": [20]}))
    again = ContextGain.from_dict(json.loads(json.dumps(gain.to_dict())))
    assert again.to_text() == gain.to_text()
    result, _ = tiny_cp(seed=2)
    page = build_report(result, gain=again).write(tmp_path)
    text = page.read_text()
    assert text.index("What each context mode adds") < text.index("The factors")
    assert "daypart adds +6.9% ndcg@10 [+3.4, +10.3]" in text


def test_on_the_demo_scenario_the_factors_show_what_was_planted():
    """Seeded planted truth (the demo site, threefold.demo.simulate, seed 7, 100,000 rows): of the planted
    effects, the audio commute (audio on mobile in the morning) appears as an item × daypart × device component
    switched on by morning and mobile whose top items are enriched for kind=audio, and the tone match as an
    item × page tone component switched on by a grave page whose top items are enriched for tone=grave."""
    from threefold.core.feedback import FeedbackWeighting
    from threefold.data.build import build_tensor
    from threefold.data.context import ColumnContext, Daypart
    from threefold.demo.simulate import simulate_site
    from threefold.models.cp.model import fit_cp

    site = simulate_site(n_events=100_000, random_state=7)
    p = site.params
    specs = [Daypart(timezone=p.timezone, starts=tuple(float(s) for s in p.daypart_starts), labels=p.daypart_labels),
             ColumnContext("device"), ColumnContext("page_tone")]
    tensor, _ = build_tensor(site.events, specs, weighting=FeedbackWeighting(w0=0.1))
    result = fit_cp(tensor, rank=16, structure="user*item:16 + item*daypart:2 + item*daypart*device:2 + item*page_tone:2",
                    reg=0.1, max_sweeps=10, random_state=1)
    factors = build_report(result, catalog=site.items, n_top=20).factors

    def found(term, peaks, attribute):
        return any(f.term == term and all(level in f.peak_levels().get(mode, "").split("/")
                                          for mode, level in peaks.items())
                   and attribute in f.enrichment.label() for f in factors)

    assert found("item*daypart*device", {"daypart": "morning", "device": "mobile"}, "kind=audio")
    assert found("item*page_tone", {"page_tone": "grave"}, "tone=grave")


def test_rank_trials_are_drawn_when_given(tmp_path):
    result, _ = tiny_cp(seed=2)
    ranks = pd.DataFrame({"rank": [2, 4, 8], "metric": ["ndcg_at_10"] * 3, "value": [0.20, 0.24, 0.22],
                          "fit": [0.1, 0.2, 0.3], "trials": [1, 1, 1]})
    report = build_report(result, ranks=ranks)
    assert "best validation ndcg_at_10 0.2400 at rank 4 (ranks tried: 2, 4, 8)" in report.to_text()
    page = _read(report.write(tmp_path))
    assert any("against rank" in image["title"] for image in page.images)


def test_rank_trials_are_read_from_the_run_store(tmp_path):
    """Trial runs as `threefold sweep` tags them, in a real local MLflow store; other models' trials are ignored."""
    from threefold.pipeline.explain import rank_trials
    from threefold.tracking.runlog import log_metrics, log_params
    from threefold.tracking.store import open_store

    store = open_store(str(tmp_path / "runs"))
    experiment = store.experiment_id("ranks")
    with store.run(experiment, run_name="cp", tags={"threefold.kind": "model", "threefold.model": "cp"}) as model_run:
        pass
    for model, rank, value in (("cp", 4, 0.20), ("cp", 4, 0.22), ("cp", 8, 0.25), ("mf", 16, 0.9)):
        run_id = store.create_run(experiment, run_name="trial", tags={"threefold.kind": "trial", "threefold.model": model,
                                                                      "threefold.key_metrics": "ndcg_at_10"})
        log_params(store, run_id, {"model.rank": rank})
        log_metrics(store, run_id, {"ndcg_at_10": value, "fit": rank / 100})
        store.finish(run_id)
    table = rank_trials(store, model_run)
    assert table["rank"].tolist() == [4, 8] and table["trials"].tolist() == [2, 1]
    np.testing.assert_allclose(table["value"], [0.21, 0.25])
    assert rank_trials(store, None) is None


def test_a_segment_restricts_the_comparison_and_unknown_ids_are_named(tmp_path):
    from threefold.models.model_io import save_model
    from threefold.pipeline.explain import explain_model

    result, _ = tiny_cp(seed=2, structure="user*item:2 + user*item*device:2")
    save_model(result, tmp_path / "model", parameters={"method": "cp"})
    users = [str(u) for u in result.vocabularies[0].labels]
    device = [str(x) for x in result.vocabularies[3].labels]
    pd.DataFrame({"user_id": users[:3]}).to_csv(tmp_path / "segment.csv", index=False)
    report = explain_model(tmp_path / "model", out=tmp_path / "out", compare=[(f"device={device[0]}", f"device={device[1]}")],
                           segment=tmp_path / "segment.csv", echo=lambda line: None)
    assert len(report.comparisons[0].per_user) == 3
    pd.DataFrame({"user_id": [users[0], "nobody"]}).to_csv(tmp_path / "bad.csv", index=False)
    with pytest.raises(ValueError, match=r"bad.csv: column user_id names 1 user\(s\) the model does not know "
                                         r"\(row 2: 'nobody'\)"):
        explain_model(tmp_path / "model", out=tmp_path / "o2", compare=[(f"device={device[0]}", f"device={device[1]}")],
                      segment=tmp_path / "bad.csv", echo=lambda line: None)


def test_a_catalog_file_with_blank_ids_names_the_rows(tmp_path):
    from threefold.models.model_io import save_model
    from threefold.pipeline.explain import explain_model

    result, _ = tiny_cp(seed=2)
    save_model(result, tmp_path / "model", parameters={"method": "cp"})
    pd.DataFrame({"item_id": ["i00", "", "i02", None], "shelf": ["a", "b", "c", "d"]}).to_csv(tmp_path / "items.csv",
                                                                                               index=False)
    with pytest.raises(ValueError, match=r"--items .*items.csv: column item_id is blank in data row\(s\) \[2, 4\]"):
        explain_model(tmp_path / "model", out=tmp_path / "out", items=tmp_path / "items.csv", echo=lambda line: None)


def test_the_text_says_which_way_an_item_moved():
    # A lower mean rank is a move up the list (rank 1 is the top): the text says "up", never a bare negative number.
    import pandas as pd

    from threefold.explain.compare import ContextComparison

    movers = pd.DataFrame({"item": [0, 1, 2], "mean_rank_a": [9.0, 2.0, 5.0], "mean_rank_b": [2.0, 9.0, 5.0],
                           "rank_change": [-7.0, 7.0, 0.0], "score_change": [0.5, -0.5, 0.0]})
    comparison = ContextComparison("a", "b", pd.DataFrame({"user": [0], "jaccard": [0.5], "kendall_tau": [0.1]}),
                                   movers, pd.DataFrame({"column": [0], "label": ["x"], "mean_term": [0.1],
                                                         "share": [1.0]}), k=3)
    text = comparison.to_text(item_labels=["n1", "n2", "n3"])
    assert "rise most under b: n1 (up 7.0 ranks), n3 (no change), n2 (down 7.0 ranks)" in text
    assert "fall most under b: n2 (down 7.0 ranks)" in text
