"""64-bit value hashes and sorted hash sets that work across chunks of a log.

The event-log scanners read a log chunk by chunk and must give results that do
not depend on the chunk size: a duplicate row, a user id or a (request, item)
key seen in one chunk must be recognized in every later one. They keep 64-bit
hashes of those values in sorted numpy arrays (8 bytes per distinct key) instead
of Python sets of the values.

Hashes are deterministic functions of the values (pandas' ``hash_array`` with
its fixed key, mixed with the SplitMix64 finalizer), so the same value gets the
same hash in every chunk, file format and process. Two different values share a
hash with probability about ``2**-64``; among ``n`` distinct values the chance of
any collision is about ``n**2 / 2**65`` (3e-6 for ten million values).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["encode_strings", "hash_dictionary", "hash_strings", "hash_numbers", "combine", "SortedHashSet", "HashCounter"]

_GOLDEN = np.uint64(0x9E3779B97F4A7C15)
_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_NULL_HASH = np.uint64(0x5BD1E9955BD1E995)


def _mix(x: np.ndarray) -> np.ndarray:
    """SplitMix64 finalizer (Steele, Lea & Flood, OOPSLA 2014), elementwise on uint64."""
    x = x ^ (x >> np.uint64(30))
    x = x * _M1
    x = x ^ (x >> np.uint64(27))
    x = x * _M2
    return x ^ (x >> np.uint64(31))


def combine(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Order-dependent combination of two uint64 hash arrays of the same shape."""
    with np.errstate(over="ignore"):
        return _mix(a * _GOLDEN + _mix(b + _GOLDEN))


def encode_strings(values: pa.Array | pa.ChunkedArray) -> tuple[np.ndarray, pa.Array]:
    """Dictionary codes of shape (n,), int64, and the distinct strings; nulls get code ``len(dictionary)``."""
    if isinstance(values, pa.ChunkedArray):
        values = values.combine_chunks()
    encoded = pc.dictionary_encode(values)
    codes = encoded.indices.fill_null(len(encoded.dictionary)).to_numpy(zero_copy_only=False).astype(np.int64)
    return codes, encoded.dictionary


def hash_dictionary(dictionary: pa.Array) -> np.ndarray:
    """Hashes of the distinct strings of :func:`encode_strings`, plus the null hash last; uint64."""
    table = np.append(pd.util.hash_array(dictionary.to_numpy(zero_copy_only=False).astype(object), categorize=False), _NULL_HASH)
    with np.errstate(over="ignore"):
        return _mix(table)


def hash_strings(values: pa.Array | pa.ChunkedArray) -> np.ndarray:
    """Hash of every string, ndarray of shape (n,), uint64; nulls share one hash.

    Each distinct string is hashed once (dictionary encoding), so the cost
    follows the number of distinct values in the chunk.
    """
    codes, dictionary = encode_strings(values)
    return hash_dictionary(dictionary)[codes]


def hash_numbers(values: np.ndarray) -> np.ndarray:
    """Hash of every number (int or float; NaN, -0.0 and 0.0 normalized), uint64 of shape (n,)."""
    values = np.asarray(values)
    if values.dtype.kind == "f":
        values = np.where(np.isnan(values), np.nan, values + 0.0)
    with np.errstate(over="ignore"):
        return _mix(pd.util.hash_array(values, categorize=False))


def _sorted_unique(keys: np.ndarray) -> np.ndarray:
    """Sorted distinct values (sort-based: faster than hashing for many distinct uint64 keys)."""
    ordered = np.sort(keys)
    keep = np.ones(ordered.size, dtype=bool)
    keep[1:] = ordered[1:] != ordered[:-1]
    return ordered[keep]


def _merge_sorted(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Sorted union of two sorted unique uint64 arrays."""
    if a.size == 0:
        return b
    merged = np.concatenate([a, b])
    merged.sort(kind="stable")  # timsort: two sorted runs merge in linear time
    keep = np.ones(merged.size, dtype=bool)
    keep[1:] = merged[1:] != merged[:-1]
    return merged[keep]


class SortedHashSet:
    """A growing set of uint64 hashes kept as one sorted unique array (8 bytes per key)."""

    def __init__(self) -> None:
        self.values = np.empty(0, dtype=np.uint64)

    def __len__(self) -> int:
        return int(self.values.size)

    def contains(self, keys: np.ndarray) -> np.ndarray:
        """Boolean mask of shape (n,): which keys are already in the set."""
        if self.values.size == 0 or keys.size == 0:
            return np.zeros(keys.shape, dtype=bool)
        pos = np.searchsorted(self.values, keys)
        pos[pos == self.values.size] = 0
        return self.values[pos] == keys

    def add(self, keys: np.ndarray) -> None:
        """Insert keys (any order, repeats allowed)."""
        if keys.size:
            self.values = _merge_sorted(self.values, _sorted_unique(keys))

    def mark_repeats(self, keys: np.ndarray) -> np.ndarray:
        """Mask of keys seen before (in the set, or earlier in ``keys``); then add them all."""
        seen = self.contains(keys)
        seen |= pd.Series(keys).duplicated().to_numpy()
        self.add(keys[~seen])
        return seen


class HashCounter:
    """Occurrence count and smallest attached value per uint64 key, merged chunk by chunk.

    Attributes
    ----------
    keys : ndarray of shape (n_keys,), uint64, sorted
    counts : ndarray of shape (n_keys,), int64
    minima : ndarray of shape (n_keys,), int64
        Smallest value given with each key (e.g. its first row number, or its
        earliest timestamp).
    """

    def __init__(self) -> None:
        self.keys = np.empty(0, dtype=np.uint64)
        self.counts = np.empty(0, dtype=np.int64)
        self.minima = np.empty(0, dtype=np.int64)

    def __len__(self) -> int:
        return int(self.keys.size)

    @staticmethod
    def _reduce(keys: np.ndarray, counts: np.ndarray, values: np.ndarray, order: np.ndarray):
        keys = keys[order]
        starts = np.flatnonzero(np.r_[True, keys[1:] != keys[:-1]])
        return keys[starts], np.add.reduceat(counts[order], starts), np.minimum.reduceat(values[order], starts)

    def add(self, keys: np.ndarray, values: np.ndarray) -> None:
        """Count each occurrence of each key; ``values`` (int, shape (n,)) go into the per-key minimum."""
        if keys.size == 0:
            return
        values = np.asarray(values, dtype=np.int64)
        ones = np.ones(keys.size, dtype=np.int64)
        uniq, counts, minima = self._reduce(keys, ones, values, np.argsort(keys, kind="stable"))
        all_keys = np.concatenate([self.keys, uniq])
        order = np.argsort(all_keys, kind="stable")  # two sorted runs: linear merge
        self.keys, self.counts, self.minima = self._reduce(
            all_keys, np.concatenate([self.counts, counts]), np.concatenate([self.minima, minima]), order
        )

    def lookup(self, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """For each key: whether it is present (bool) and its minimum (int64, 0 when absent)."""
        if self.keys.size == 0:
            return np.zeros(keys.shape, dtype=bool), np.zeros(keys.shape, dtype=np.int64)
        pos = np.searchsorted(self.keys, keys)
        pos[pos == self.keys.size] = 0
        found = self.keys[pos] == keys
        return found, np.where(found, self.minima[pos], 0)
