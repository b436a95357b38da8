"""Stable label-to-index maps for the modes of a tensor.

A :class:`Vocabulary` maps the string labels of one mode (user ids, item ids,
context levels) to contiguous integer indices ``0 .. size - 1``. Indices never
move once assigned: growing a vocabulary appends new labels at the end, so a
previous model's factor rows stay aligned (warm starts, fold-in).

Labels are always strings. A vocabulary serializes to a plain JSON list, never
to pickle.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Iterable, Literal

import numpy as np
import pandas as pd

__all__ = ["UNKNOWN", "Vocabulary", "EncodedLabels", "UnseenPolicy"]

#: The explicit level that missing or unseen context values map to.
UNKNOWN = "unknown"

UnseenPolicy = Literal["drop", "unknown", "error"]


@dataclass(frozen=True)
class EncodedLabels:
    """Result of encoding labels against a vocabulary.

    Attributes
    ----------
    codes : ndarray of shape (n,), int32
        Index of each label; ``-1`` marks a dropped row (policy ``"drop"``).
    n_unseen : int
        Number of labels that were not in the vocabulary.
    first_unseen_rows : list of int
        Up to ten 0-based positions of unseen labels, for messages.
    """

    codes: np.ndarray
    n_unseen: int
    first_unseen_rows: list[int]


@dataclass(frozen=True)
class Vocabulary:
    """An ordered, immutable set of string labels with O(1) lookup.

    Parameters
    ----------
    labels : sequence of str
        Labels in index order. Must be unique.
    name : str, default=""
        Mode name, used in error messages.
    """

    labels: tuple[str, ...]
    name: str = ""
    _index: dict[str, int] = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        labels = tuple(str(label) for label in self.labels)
        object.__setattr__(self, "labels", labels)
        index = {label: i for i, label in enumerate(labels)}
        if len(index) != len(labels):
            seen: set[str] = set()
            dup = next(label for label in labels if label in seen or seen.add(label))
            raise ValueError(
                f"Vocabulary {self.name!r} has duplicate label {dup!r}."
            )
        object.__setattr__(self, "_index", index)

    @classmethod
    def from_values(cls, values: Iterable[str], name: str = "") -> "Vocabulary":
        """Build a vocabulary of the distinct values, sorted as strings."""
        uniques = pd.unique(pd.Series(list(values) if not isinstance(values, pd.Series) else values, dtype=object))
        return cls(tuple(sorted(str(v) for v in uniques)), name=name)

    def __len__(self) -> int:
        return len(self.labels)

    def __contains__(self, label: object) -> bool:
        return label in self._index

    def index(self, label: str) -> int:
        """Index of ``label``; raises ``KeyError`` naming the mode if absent."""
        try:
            return self._index[label]
        except KeyError:
            raise KeyError(f"Label {label!r} is not in the {self.name or 'mode'} vocabulary.") from None

    def extend(self, labels: Iterable[str]) -> "Vocabulary":
        """Return a vocabulary with the new labels appended (existing indices kept)."""
        new = [str(label) for label in pd.unique(pd.Series(list(labels), dtype=object)) if str(label) not in self._index]
        return Vocabulary(self.labels + tuple(sorted(new)), name=self.name)

    def encode(self, values: pd.Series | np.ndarray | list, policy: UnseenPolicy = "error") -> EncodedLabels:
        """Map labels to indices.

        Parameters
        ----------
        values : array-like of str, shape (n,)
        policy : {"error", "drop", "unknown"}
            What to do with labels outside the vocabulary: raise; mark the row
            with code ``-1`` (callers drop and count it); or map it to the
            :data:`UNKNOWN` level, which must then be in the vocabulary.

        Returns
        -------
        EncodedLabels
        """
        codes, uniques = pd.factorize(pd.Series(values) if not isinstance(values, pd.Series) else values)
        if (codes < 0).any():
            uniques = pd.Index(list(uniques) + [None], dtype=object)
            codes = np.where(codes < 0, len(uniques) - 1, codes)
        return self.encode_codes(codes, np.asarray(uniques, dtype=object), policy=policy)

    def encode_codes(self, codes: np.ndarray, uniques: np.ndarray | tuple, policy: UnseenPolicy = "error") -> EncodedLabels:
        """Map factorized labels to indices (the fast path for large columns).

        Parameters
        ----------
        codes : ndarray of shape (n,), int
            Index of each row's label in ``uniques`` (e.g. from ``pandas.factorize``).
        uniques : array-like of shape (k,), str
        policy : {"error", "drop", "unknown"}
            See :meth:`encode`.

        Returns
        -------
        EncodedLabels
        """
        table = pd.Index(self.labels, dtype=object).get_indexer(pd.Index(np.asarray(uniques, dtype=object)))
        mapped = table[np.asarray(codes)].astype(np.int32)
        unseen = np.flatnonzero(mapped < 0)
        first = [int(i) for i in unseen[:10]]
        if unseen.size and policy == "error":
            raise KeyError(
                f"{unseen.size} label(s) are not in the {self.name or 'mode'} vocabulary, "
                f"e.g. {uniques[codes[first[0]]]!r} at row {first[0]}."
            )
        if unseen.size and policy == "unknown":
            if UNKNOWN not in self._index:
                raise KeyError(
                    f"Policy 'unknown' needs an {UNKNOWN!r} level in the {self.name or 'mode'} vocabulary."
                )
            mapped[unseen] = self._index[UNKNOWN]
        return EncodedLabels(codes=mapped, n_unseen=int(unseen.size), first_unseen_rows=first)

    def to_json(self) -> dict:
        """A JSON-serializable dict (``name`` and ``labels``)."""
        return {"name": self.name, "labels": list(self.labels)}

    @classmethod
    def from_json(cls, data: dict) -> "Vocabulary":
        """Inverse of :meth:`to_json`."""
        labels = data["labels"]
        if not all(isinstance(label, str) for label in labels):
            raise ValueError(f"Vocabulary {data.get('name', '')!r} holds non-string labels.")
        return cls(tuple(labels), name=str(data.get("name", "")))
