"""threefold: context-aware recommendation from implicit feedback on the CPU.

The public API, by layer (see DEVELOPERS.md):

* data: :func:`load_events`, :func:`validate_events`, :func:`load_validated_events`,
  context modes (:class:`Daypart`, :class:`WeekPart`, :class:`ColumnContext`,
  :class:`CrossedContext`), :func:`build_tensor`, :class:`FeedbackWeighting`,
  :func:`estimate_position_propensity`, the demo site (:func:`simulate_site`);
* the tensor: :class:`SparseTensor`, :class:`Vocabulary`, :func:`save_tensor` / :func:`load_tensor`;
* models: :class:`CPModel` (structures via :class:`Structure`), :class:`HOOIModel`,
  :class:`ImplicitTuckerModel`, all implementing :class:`Scorer`;
* evaluation: :func:`temporal_split`, :func:`evaluate_stage`, :func:`evaluate`, the baselines;
* ranking: :func:`top_k`, :func:`top_k_product`, :class:`Recommender`, and the batch job
  :func:`score_requests` (``threefold score``).

Experiment tracking (MLflow) lives in :mod:`threefold.pipeline.experiment`, :mod:`threefold.tracking.store`,
:mod:`threefold.pipeline.sweep` and :mod:`threefold.tracking.pyfunc`, imported on demand.
"""

import os as _os

# Compiled numba kernels are cached in the user's cache folder, never beside the code (an editable
# install would otherwise write them into the source tree); an explicit NUMBA_CACHE_DIR wins.
_os.environ.setdefault("NUMBA_CACHE_DIR", _os.path.join(
    _os.environ.get("XDG_CACHE_HOME") or _os.path.join(_os.path.expanduser("~"), ".cache"), "threefold", "numba"))

#: Public name -> the module that defines it. Imported on first use (PEP 562), so that
#: ``import threefold`` and ``threefold --help`` do not pay for numpy, scipy, numba and pandas.
_EXPORTS = {
    "BuildReport": "threefold.data.build",
    "CPModel": "threefold.models.cp.model",
    "CPResult": "threefold.models.cp.model",
    "CellEvidence": "threefold.core.feedback",
    "ColumnContext": "threefold.data.context",
    "ConvergenceWarning": "threefold.core.exceptions",
    "CrossedContext": "threefold.data.context",
    "Daypart": "threefold.data.context",
    "EvaluationResult": "threefold.evaluation.harness",
    "EventSplit": "threefold.evaluation.splits",
    "FeedbackWeighting": "threefold.core.feedback",
    "HOOIModel": "threefold.models.tucker.hooi",
    "ImplicitTuckerModel": "threefold.models.tucker.implicit",
    "PopularityBaseline": "threefold.models.baselines",
    "PositionPropensity": "threefold.data.propensity",
    "RandomBaseline": "threefold.models.baselines",
    "Recommender": "threefold.ranking.recommender",
    "ScoreTerms": "threefold.core.scoring",
    "Scorer": "threefold.core.scoring",
    "SparseTensor": "threefold.core.tensor",
    "Structure": "threefold.models.cp.structure",
    "SweepRecord": "threefold.models.cp.model",
    "Term": "threefold.models.cp.structure",
    "TuckerResult": "threefold.models.tucker.result",
    "UNKNOWN": "threefold.core.vocabulary",
    "ValidationReport": "threefold.data.validate",
    "Vocabulary": "threefold.core.vocabulary",
    "WeekPart": "threefold.data.context",
    "build_tensor": "threefold.data.build",
    "cell_weights": "threefold.core.feedback",
    "context_free_mf": "threefold.models.baselines",
    "derive_contexts": "threefold.data.context",
    "estimate_position_propensity": "threefold.data.propensity",
    "evaluate": "threefold.evaluation.harness",
    "evaluate_stage": "threefold.evaluation.harness",
    "factor_match_score": "threefold.models.diagnostics",
    "fit_cp": "threefold.models.cp.model",
    "fit_hooi": "threefold.models.tucker.hooi",
    "fit_implicit_tucker": "threefold.models.tucker.implicit",
    "fold_in": "threefold.models.cp.model",
    "last_n_split": "threefold.evaluation.splits",
    "load_events": "threefold.data.events",
    "load_items": "threefold.data.events",
    "load_model": "threefold.models.model_io",
    "load_tensor": "threefold.core.tensor_io",
    "load_validated_events": "threefold.data.validate",
    "parse_context": "threefold.data.context",
    "pseudonymize_ids": "threefold.data.events",
    "save_model": "threefold.models.model_io",
    "save_tensor": "threefold.core.tensor_io",
    "score_requests": "threefold.pipeline.score",
    "select_best": "threefold.evaluation.harness",
    "select_window": "threefold.data.build",
    "simulate_site": "threefold.demo.simulate",
    "temporal_split": "threefold.evaluation.splits",
    "top_k": "threefold.ranking.topk",
    "top_k_product": "threefold.ranking.topk",
    "true_relevance": "threefold.demo.simulate",
    "validate_events": "threefold.data.validate",
    "write_site": "threefold.demo.simulate",
}

__version__ = "0.1.0"

__all__ = [
    "BuildReport", "CPModel", "CPResult", "CellEvidence", "ColumnContext", "ConvergenceWarning",
    "CrossedContext", "Daypart", "EvaluationResult", "EventSplit", "FeedbackWeighting", "HOOIModel",
    "ImplicitTuckerModel", "PopularityBaseline", "PositionPropensity", "RandomBaseline", "Recommender", "ScoreTerms",
    "Scorer", "SparseTensor", "Structure", "SweepRecord", "Term", "TuckerResult", "UNKNOWN",
    "ValidationReport", "Vocabulary", "WeekPart", "build_tensor", "cell_weights", "context_free_mf",
    "derive_contexts", "estimate_position_propensity", "evaluate", "evaluate_stage", "factor_match_score",
    "fit_cp", "fit_hooi", "fit_implicit_tucker", "fold_in", "last_n_split", "load_events", "load_items",
    "load_model", "load_tensor", "load_validated_events", "parse_context", "pseudonymize_ids",
    "save_model", "save_tensor", "score_requests", "select_best", "select_window", "simulate_site", "temporal_split",
    "top_k", "top_k_product",
    "true_relevance", "validate_events", "write_site", "__version__",
]


def __getattr__(name: str):
    if name in _EXPORTS:
        import importlib

        value = getattr(importlib.import_module(_EXPORTS[name]), name)
        globals()[name] = value  # later lookups skip this function
        return value
    raise AttributeError(f"module 'threefold' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(__all__)
