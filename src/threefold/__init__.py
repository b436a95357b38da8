"""threefold: context-aware recommendation from implicit feedback on the CPU.

The public API, by layer (see DEVELOPERS.md):

* data: :func:`load_events`, :func:`validate_events`, :func:`load_validated_events`,
  context modes (:class:`Daypart`, :class:`WeekPart`, :class:`ColumnContext`,
  :class:`CrossedContext`), :func:`build_tensor`, :class:`FeedbackWeighting`,
  :func:`estimate_position_propensity`, the demo site (:func:`simulate_site`);
* the tensor: :class:`SparseTensor`, :class:`Vocabulary`, :func:`save_tensor` / :func:`load_tensor`;
* models: :class:`CPModel` (structures via :class:`Structure`), :class:`HOOIModel`,
  :class:`ImplicitTuckerModel`, all implementing :class:`Scorer`;
* evaluation: :func:`temporal_split`, :func:`evaluate_stage`, :func:`evaluate`, the baselines.

Experiment tracking (MLflow) lives in :mod:`threefold.experiment`, :mod:`threefold.store`,
:mod:`threefold.sweep` and :mod:`threefold.pyfunc_model`, imported on demand.
"""

from threefold.baselines import PopularityBaseline, RandomBaseline, context_free_mf
from threefold.build import BuildReport, build_tensor, select_window
from threefold.context import ColumnContext, CrossedContext, Daypart, WeekPart, derive_contexts, parse_context
from threefold.cp import CPModel, CPResult, SweepRecord, fit_cp, fold_in
from threefold.diagnostics import factor_match_score
from threefold.evaluate import EvaluationResult, evaluate, evaluate_stage, select_best
from threefold.events import load_events, load_items, pseudonymize_ids
from threefold.exceptions import ConvergenceWarning
from threefold.feedback import CellEvidence, FeedbackWeighting, cell_weights
from threefold.hooi import HOOIModel, fit_hooi
from threefold.implicit_tucker import ImplicitTuckerModel, fit_implicit_tucker
from threefold.model_io import load_model, save_model
from threefold.propensity import PositionPropensity, estimate_position_propensity
from threefold.scoring import Scorer, ScoreTerms
from threefold.simulate import simulate_site, true_relevance, write_site
from threefold.splits import EventSplit, last_n_split, temporal_split
from threefold.structure import Structure, Term
from threefold.tensor import SparseTensor
from threefold.tensor_io import load_tensor, save_tensor
from threefold.tucker import TuckerResult
from threefold.validate import ValidationReport, load_validated_events, validate_events
from threefold.vocabulary import UNKNOWN, Vocabulary

__version__ = "0.1.0"

__all__ = [
    "BuildReport", "CPModel", "CPResult", "CellEvidence", "ColumnContext", "ConvergenceWarning",
    "CrossedContext", "Daypart", "EvaluationResult", "EventSplit", "FeedbackWeighting", "HOOIModel",
    "ImplicitTuckerModel", "PopularityBaseline", "PositionPropensity", "RandomBaseline", "ScoreTerms",
    "Scorer", "SparseTensor", "Structure", "SweepRecord", "Term", "TuckerResult", "UNKNOWN",
    "ValidationReport", "Vocabulary", "WeekPart", "build_tensor", "cell_weights", "context_free_mf",
    "derive_contexts", "estimate_position_propensity", "evaluate", "evaluate_stage", "factor_match_score",
    "fit_cp", "fit_hooi", "fit_implicit_tucker", "fold_in", "last_n_split", "load_events", "load_items",
    "load_model", "load_tensor", "load_validated_events", "parse_context", "pseudonymize_ids",
    "save_model", "save_tensor", "select_best", "select_window", "simulate_site", "temporal_split",
    "true_relevance", "validate_events", "write_site", "__version__",
]
