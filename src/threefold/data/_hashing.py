"""64-bit value hashes and sorted hash sets that work across chunks of a log.

The event-log scanners read a log chunk by chunk and must give results that do
not depend on the chunk size: a duplicate row, a user id or a (request, item)
key seen in one chunk must be recognized in every later one. They keep 64-bit
hashes of those values in open-addressing hash tables (numpy arrays probed by
numba-compiled loops, linear probing, load factor kept between 0.35 and 0.7:
12 to 23 bytes per distinct key and per stored 8-byte field) instead of Python
sets of the values, which would take about 60 bytes per key more.

Hashes are deterministic functions of the values (pandas' ``hash_array`` with
its fixed key, mixed with the SplitMix64 finalizer), so the same value gets the
same hash in every chunk, file format and process. Two different values share a
hash with probability about ``2**-64``; among ``n`` distinct values the chance of
any collision is about ``n**2 / 2**65`` (3e-6 for ten million values). The hash
0 marks an empty slot, so a key hashing to 0 is stored as 1 (one more collision
pair of the same negligible probability).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from numba import njit, prange
import pyarrow as pa
import pyarrow.compute as pc

__all__ = ["encode_strings", "hash_dictionary", "hash_strings", "hash_numbers", "combine", "HashSet", "HashCounter"]

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


@njit(cache=True, nogil=True)
def _slot(table: np.ndarray, key: np.uint64) -> int:
    """Slot holding ``key``, or the empty slot where it would go (linear probing)."""
    mask = np.uint64(table.size - 1)
    one = np.uint64(1)
    j = key & mask
    while table[j] != 0 and table[j] != key:
        j = (j + one) & mask
    return np.int64(j)


@njit(cache=True, nogil=True)
def _insert(table: np.ndarray, keys: np.ndarray, is_new: np.ndarray) -> int:
    """Insert keys in order; ``is_new[i]`` tells whether key i was absent before. Returns the number added."""
    added = 0
    for i in range(keys.size):
        key = keys[i] if keys[i] != 0 else np.uint64(1)
        j = _slot(table, key)
        is_new[i] = table[j] == 0
        if is_new[i]:
            table[j] = key
            added += 1
    return added


@njit(cache=True, nogil=True)
def _count(table: np.ndarray, counts: np.ndarray, minima: np.ndarray, keys: np.ndarray, values: np.ndarray) -> int:
    """Count keys and keep the smallest value per key. Returns the number of keys added."""
    added = 0
    for i in range(keys.size):
        key = keys[i] if keys[i] != 0 else np.uint64(1)
        j = _slot(table, key)
        if table[j] == 0:
            table[j] = key
            counts[j] = 0
            minima[j] = values[i]
            added += 1
        counts[j] += 1
        if values[i] < minima[j]:
            minima[j] = values[i]
    return added


@njit(cache=True, nogil=True, parallel=True)
def _contains(table: np.ndarray, keys: np.ndarray, found: np.ndarray) -> None:
    """``found[i]``: whether key i is in the table (read only, so the probes run in parallel)."""
    for i in prange(keys.size):
        key = keys[i] if keys[i] != 0 else np.uint64(1)
        found[i] = table[_slot(table, key)] != 0


@njit(cache=True, nogil=True)
def _find(table: np.ndarray, keys: np.ndarray, found: np.ndarray, slots: np.ndarray) -> None:
    for i in range(keys.size):
        key = keys[i] if keys[i] != 0 else np.uint64(1)
        j = _slot(table, key)
        found[i] = table[j] != 0
        slots[i] = j


class HashSet:
    """A growing set of uint64 hashes (open addressing, about 12-23 bytes per key)."""

    def __init__(self) -> None:
        self.table = np.zeros(1024, dtype=np.uint64)
        self.size = 0

    def __len__(self) -> int:
        return self.size

    def _fields(self) -> tuple[np.ndarray, ...]:
        return ()

    def _reserve(self, extra: int) -> None:
        """Grow (doubling, rehashing every field) so that the load stays at most 0.7."""
        capacity = self.table.size
        while (self.size + extra) > 0.7 * capacity:
            capacity *= 2
        if capacity == self.table.size:
            return
        filled = self.table != 0
        old = [f[filled] for f in self._fields()]
        keys = self.table[filled]
        self.table = np.zeros(capacity, dtype=np.uint64)
        _insert(self.table, keys, np.empty(keys.size, dtype=np.bool_))
        if old:
            found, slots = self._lookup_slots(keys)
            for name, values in zip(self._field_names(), old):
                grown = np.zeros(capacity, dtype=values.dtype)
                grown[slots] = values
                setattr(self, name, grown)

    def _field_names(self) -> tuple[str, ...]:
        return ()

    def _lookup_slots(self, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        keys = np.ascontiguousarray(keys, dtype=np.uint64)
        found = np.empty(keys.size, dtype=np.bool_)
        slots = np.empty(keys.size, dtype=np.int64)
        _find(self.table, keys, found, slots)
        return found, slots

    def contains(self, keys: np.ndarray) -> np.ndarray:
        """Boolean mask of shape (n,): which keys are in the set."""
        keys = np.ascontiguousarray(keys, dtype=np.uint64)
        found = np.empty(keys.size, dtype=np.bool_)
        _contains(self.table, keys, found)
        return found

    def mark_repeats(self, keys: np.ndarray) -> np.ndarray:
        """Insert keys in order; mask of those seen before (in the set or earlier in ``keys``)."""
        keys = np.ascontiguousarray(keys, dtype=np.uint64)
        self._reserve(keys.size)
        is_new = np.empty(keys.size, dtype=np.bool_)
        self.size += _insert(self.table, keys, is_new)
        return ~is_new

    def add(self, keys: np.ndarray) -> None:
        """Insert keys (any order, repeats allowed)."""
        self.mark_repeats(keys)


class HashCounter(HashSet):
    """Occurrence count and smallest attached value per uint64 key.

    ``counts`` and ``minima`` (int64) are aligned with the slots of ``table``;
    :meth:`items` returns the filled ones.
    """

    def __init__(self) -> None:
        super().__init__()
        self.counts = np.zeros(self.table.size, dtype=np.int64)
        self.minima = np.zeros(self.table.size, dtype=np.int64)

    def _fields(self) -> tuple[np.ndarray, ...]:
        return (self.counts, self.minima)

    def _field_names(self) -> tuple[str, ...]:
        return ("counts", "minima")

    def add(self, keys: np.ndarray, values: np.ndarray) -> None:
        """Count each occurrence of each key; ``values`` (int, shape (n,)) go into the per-key minimum."""
        keys = np.ascontiguousarray(keys, dtype=np.uint64)
        self._reserve(keys.size)
        self.size += _count(self.table, self.counts, self.minima, keys, np.ascontiguousarray(values, dtype=np.int64))

    def items(self) -> tuple[np.ndarray, np.ndarray]:
        """Counts and minima of every key (int64 arrays of shape (n_keys,), in slot order)."""
        filled = self.table != 0
        return self.counts[filled], self.minima[filled]

    def lookup(self, keys: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """For each key: whether it is present (bool) and its minimum (int64, 0 when absent)."""
        found, slots = self._lookup_slots(keys)
        return found, np.where(found, self.minima[slots], 0)
