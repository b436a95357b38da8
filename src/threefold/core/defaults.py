"""Defaults shared by the API and the command line, in a module with no imports.

Defined once here so that ``threefold --help`` can show them without importing
numpy, pandas or numba; the modules that use them re-export them under their
usual names (``threefold.data.events.DEFAULT_CHUNK_ROWS`` and so on).
"""

#: Rows per chunk when reading an event log (about 100-200 MB of transient memory for a typical log).
EVENT_CHUNK_ROWS = 250_000
#: Requests per part of a score job.
SCORE_CHUNK_ROWS = 50_000
#: List length of a request that gives none.
LIST_LENGTH = 10
#: The refresh policies of the closed-loop simulation, in the order of its table.
LOOP_POLICIES = ("stale", "nightly", "retrain", "hourly", "hourly+metadata", "hourly+explore", "popularity", "oracle")
#: Validation errors no single row is wrong for, but that change a model: refused even when dropping bad rows,
#: and accepted (as warnings) only when named in ``allow`` / ``--allow`` / ``[data] allow``.
SUSPICIOUS_CODES = ("case_variant_id", "outlying_timestamp")
