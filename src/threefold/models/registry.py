"""Every model method of the tool, registered by static import: name -> estimator class.

The ``method`` key of a config's ``[models.NAME]`` table names one of these;
each class carries its parameter table (``cls.params``), which the config
loader, the sweep space and ``threefold models`` read. Adding a model: write
its module (fit function, parameter table, estimator), add one line here, and
give it a parity test (see ``DEVELOPERS.md``, "Adding a model").
"""

from __future__ import annotations

from threefold.core.params import ParamTable
from threefold.models.baselines import PopularityBaseline, RandomBaseline
from threefold.models.cp.model import CPModel
from threefold.models.tucker.hooi import HOOIModel
from threefold.models.tucker.implicit import ImplicitTuckerModel

__all__ = ["MODELS", "FACTOR_METHODS", "model_class", "param_table"]

#: Config ``method`` -> estimator class.
MODELS: dict[str, type] = {
    "cp": CPModel,
    "hooi": HOOIModel,
    "implicit_tucker": ImplicitTuckerModel,
    "popularity": PopularityBaseline,
    "random": RandomBaseline,
}

#: Methods fitted on the training tensor (the others learn from events as of request time).
FACTOR_METHODS = tuple(name for name, cls in MODELS.items() if not cls.learns_from_events)


def model_class(method: str) -> type:
    """The estimator class of a model ``method``; a clear error naming the methods otherwise."""
    if method not in MODELS:
        raise ValueError(f"Unknown model method {method!r}; methods are {', '.join(MODELS)}.")
    return MODELS[method]


def param_table(method: str) -> ParamTable:
    """The parameter table of a model ``method``."""
    return model_class(method).params
