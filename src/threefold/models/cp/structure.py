"""Model structures: which modes each group of CP components uses.

A plain N-way CP lets every component use every mode. The General
Factorization Framework (Hidasi & Tikk, "General factorization framework for
context-aware recommendations", Data Mining and Knowledge Discovery 30, 2016;
arXiv:1401.4529) instead sums *terms*, each a CP over a subset of the modes::

    x̂(u, i, d, v) = Σ_r a_ur b_ir  +  Σ_s a'_us b'_is c_ds  +  Σ_t b''_it e_vt
                       user*item       user*item*daypart        item*device

One engine fits all of them: a component that does not use a mode keeps the
constant 1 in that mode's factor column, so the model stays a CP tensor and
every formula of the engine (Gram products, row systems, scoring) is unchanged.

Spec syntax
-----------
A structure is written as terms joined by ``+``; a term is mode names joined by
``*`` with an optional ``:rank`` (terms without one take the model's ``rank``)::

    "user*item*daypart"                              plain 3-way CP
    "user*item"                                      context-free MF
    "user*item:32 + user*item*daypart:8 + item*device:4"

Whitespace is ignored. Mode names are those of the tensor (``mode_names``).
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from typing import Sequence

import numpy as np

from threefold.core.checks import check_int

__all__ = ["Term", "Structure", "resolve_structure"]

_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_\-]*$")


@dataclass(frozen=True)
class Term:
    """One group of components and the modes they use.

    Parameters
    ----------
    modes : tuple of str
        Mode names, unique, at least one.
    rank : int
        Number of components in the term, at least 1.
    """

    modes: tuple[str, ...]
    rank: int

    def __post_init__(self) -> None:
        object.__setattr__(self, "modes", tuple(str(m) for m in self.modes))
        if not self.modes:
            raise ValueError("A structure term needs at least one mode.")
        if len(set(self.modes)) != len(self.modes):
            raise ValueError(f"Structure term {'*'.join(self.modes)!r} names a mode twice.")
        check_int("rank", self.rank, low=1, owner=f"term {'*'.join(self.modes)!r}")

    def __str__(self) -> str:
        return f"{'*'.join(self.modes)}:{self.rank}"


@dataclass(frozen=True)
class Structure:
    """An ordered sum of terms; components are numbered term by term.

    Parameters
    ----------
    terms : tuple of Term
        At least one; no two terms over the same set of modes (raise that
        term's rank instead).
    """

    terms: tuple[Term, ...]

    def __post_init__(self) -> None:
        object.__setattr__(self, "terms", tuple(self.terms))
        if not self.terms:
            raise ValueError("A structure needs at least one term.")
        seen: set[frozenset[str]] = set()
        for term in self.terms:
            key = frozenset(term.modes)
            if key in seen:
                raise ValueError(
                    f"Structure term {'*'.join(term.modes)!r} appears twice; give one term a larger rank instead."
                )
            seen.add(key)

    # ------------------------------------------------------------------ construction
    @classmethod
    def parse(cls, spec: str, rank: int) -> "Structure":
        """Structure from a spec string such as ``"user*item:32 + item*device"``.

        Parameters
        ----------
        spec : str
            See the module docstring for the syntax.
        rank : int
            Rank of every term written without ``:rank``.
        """
        if not isinstance(spec, str) or not spec.strip():
            raise ValueError(f"A structure spec must be a non-empty string, got {spec!r}.")
        terms = []
        for raw in spec.split("+"):
            text = raw.replace(" ", "").replace("\t", "")
            if ":" in text:
                text, _, rank_text = text.partition(":")
                if not rank_text.isdigit():
                    raise ValueError(f"Structure term {raw.strip()!r}: the rank after ':' must be a positive integer.")
                term_rank = int(rank_text)
            else:
                term_rank = rank
            modes = tuple(text.split("*"))
            bad = [m for m in modes if not _NAME.match(m)]
            if bad:
                raise ValueError(
                    f"Structure term {raw.strip()!r} has an invalid mode name {bad[0]!r}; "
                    "write terms as mode names joined by '*', e.g. 'user*item:16'."
                )
            terms.append(Term(modes, term_rank))
        return cls(tuple(terms))

    @classmethod
    def full(cls, mode_names: Sequence[str], rank: int) -> "Structure":
        """Plain N-way CP: one term over every mode."""
        return cls((Term(tuple(mode_names), rank),))

    def __str__(self) -> str:
        return " + ".join(str(term) for term in self.terms)

    # ------------------------------------------------------------------ components
    @property
    def rank(self) -> int:
        """Total number of components."""
        return sum(term.rank for term in self.terms)

    def check_modes(self, mode_names: Sequence[str]) -> None:
        """Raise if a term names a mode the tensor does not have."""
        for term in self.terms:
            for mode in term.modes:
                if mode not in mode_names:
                    raise ValueError(
                        f"Structure term {'*'.join(term.modes)!r} uses mode {mode!r}, "
                        f"but the tensor's modes are {tuple(mode_names)}."
                    )

    def active_mask(self, mode_names: Sequence[str]) -> np.ndarray:
        """Which components use which mode.

        Returns
        -------
        ndarray of shape (ndim, rank), bool
            ``mask[n, r]`` is True when component ``r`` uses mode ``n``; where it
            is False the factor column is the constant 1.
        """
        self.check_modes(mode_names)
        names = list(mode_names)
        mask = np.zeros((len(names), self.rank), dtype=bool)
        start = 0
        for term in self.terms:
            for mode in term.modes:
                mask[names.index(mode), start : start + term.rank] = True
            start += term.rank
        return mask

    def component_terms(self) -> np.ndarray:
        """ndarray of shape (rank,), int64: the term index of each component."""
        return np.repeat(np.arange(len(self.terms)), [term.rank for term in self.terms])

    def component_labels(self) -> tuple[str, ...]:
        """One label per component, e.g. ``"user*item #0"``."""
        return tuple(
            f"{'*'.join(term.modes)} #{j}" for term in self.terms for j in range(term.rank)
        )


def resolve_structure(structure: "Structure | str | None", mode_names: Sequence[str], rank: int) -> Structure:
    """The structure a model fits: plain CP when ``None``, parsed when a string.

    Parameters
    ----------
    structure : Structure, str or None
    mode_names : sequence of str
        The tensor's modes; every mode a term names must be among them.
    rank : int
        Rank of plain CP, and of every spec term written without ``:rank``.
    """
    if structure is None:
        result = Structure.full(mode_names, rank)
    elif isinstance(structure, str):
        result = Structure.parse(structure, rank)
    elif isinstance(structure, Structure):
        result = structure
    else:
        raise ValueError(
            f"The 'structure' parameter must be None, a spec string or a Structure. Got {structure!r} instead."
        )
    result.check_modes(mode_names)
    return result
