"""The models the harness ranks with: every one a :class:`~threefold.core.scoring.Ranker`.

Factor models bind through the shared id resolver (:mod:`threefold.core.resolve`),
so the harness scores unknown users, items and context levels exactly as
serving does; baselines bind as they are.
"""

from __future__ import annotations

from typing import Sequence

from threefold.core.resolve import DEFAULT_POLICY, BoundFactors, UnknownPolicy
from threefold.core.scoring import Ranker, Scorer
from threefold.core.vocabulary import Vocabulary

__all__ = ["ScorerRanker", "as_ranker"]


class ScorerRanker(Ranker):
    """A fitted :class:`~threefold.core.scoring.Scorer` with explicit vocabularies or unknown-id policy.

    Parameters
    ----------
    scorer : Scorer
    vocabularies : sequence of Vocabulary, optional
        One per mode, named by mode (as the builder names them); default the model's.
    policy : UnknownPolicy, default=DEFAULT_POLICY
    """

    def __init__(self, scorer: Scorer, *, vocabularies: Sequence[Vocabulary] | None = None,
                 policy: UnknownPolicy = DEFAULT_POLICY):
        self.scorer = scorer
        self.vocabularies = vocabularies
        self.policy = policy

    @property
    def supports_fold_in(self) -> bool:
        return self.scorer.supports_fold_in

    def fitted(self) -> Scorer:
        return self.scorer.fitted()

    def bind(self, queries) -> BoundFactors:
        return self.scorer.bind(queries, vocabularies=self.vocabularies, policy=self.policy)


def as_ranker(model: object) -> Ranker:
    """``model`` itself when it is a :class:`Ranker` (every threefold model is); else a clear error."""
    if isinstance(model, Ranker):
        return model
    raise TypeError(f"Cannot evaluate a {type(model).__name__}: give a fitted threefold model (a Scorer or a "
                    "baseline, both Rankers).")
