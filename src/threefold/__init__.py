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

from threefold.models.baselines import PopularityBaseline, RandomBaseline, context_free_mf
from threefold.data.build import BuildReport, build_tensor, select_window
from threefold.data.context import ColumnContext, CrossedContext, Daypart, WeekPart, derive_contexts, parse_context
from threefold.models.cp.model import CPModel, CPResult, SweepRecord, fit_cp, fold_in
from threefold.models.diagnostics import factor_match_score
from threefold.evaluation.harness import EvaluationResult, evaluate, evaluate_stage, select_best
from threefold.data.events import load_events, load_items, pseudonymize_ids
from threefold.core.exceptions import ConvergenceWarning
from threefold.core.feedback import CellEvidence, FeedbackWeighting, cell_weights
from threefold.models.tucker.hooi import HOOIModel, fit_hooi
from threefold.models.tucker.implicit import ImplicitTuckerModel, fit_implicit_tucker
from threefold.models.model_io import load_model, save_model
from threefold.data.propensity import PositionPropensity, estimate_position_propensity
from threefold.core.scoring import Scorer, ScoreTerms
from threefold.demo.simulate import simulate_site, true_relevance, write_site
from threefold.evaluation.splits import EventSplit, last_n_split, temporal_split
from threefold.models.cp.structure import Structure, Term
from threefold.core.tensor import SparseTensor
from threefold.core.tensor_io import load_tensor, save_tensor
from threefold.models.tucker.result import TuckerResult
from threefold.data.validate import ValidationReport, load_validated_events, validate_events
from threefold.core.vocabulary import UNKNOWN, Vocabulary
from threefold.pipeline.score import score_requests
from threefold.ranking.recommender import Recommender
from threefold.ranking.topk import top_k, top_k_product

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
