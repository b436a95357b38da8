"""Small invented event logs for the event-log tests (fictional ids, random data).

Shared by ``test_events.py`` and ``test_validate.py``.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq

NOW = 1_900_000_000  # fixed "current time" for the future-timestamp check
BASE = 1_709_251_200  # 2024-03-01T00:00:00Z


def write_text(path: Path, text: str) -> Path:
    """Write a CSV given as text (leading spaces of each line removed)."""
    path.write_text("\n".join(line.strip() for line in text.strip().splitlines()) + "\n", encoding="utf-8")
    return path


def invented_log(seed: int = 0, requests: int = 12, shown: int = 4) -> pd.DataFrame:
    """Invented log, every column text: requests of ``shown`` impressions, then clicks.

    Each request shows ``shown`` items at positions 1..shown; some items are
    clicked, and the click rows come later in the file than their impressions
    (often several rows later, so that with ``chunk_rows=7`` they fall in
    another chunk). Rows 8 and 15 repeat rows 7 and 14 exactly (a duplicate on
    each side of the 7-row chunk boundaries), and one click has no impression.
    """
    rng = np.random.default_rng(seed)
    rows = []
    for r in range(requests):
        user = f"reader{rng.integers(0, 5)}"
        items = rng.choice(30, size=shown, replace=False)
        t = BASE + 600 * r
        start = len(rows)
        for pos, item in enumerate(items, start=1):
            rows.append(dict(user_id=user, item_id=f"story{item:02d}", timestamp=str(t), event="impression",
                             position=str(pos), dwell_seconds="", request_id=f"q{r}",
                             device=["phone", "desktop"][r % 2], page_tone=["calm", "", "urgent"][pos % 3]))
        for pos in np.flatnonzero(rng.random(shown) < 0.4) + 1:
            rows.append(dict(rows[start + pos - 1], timestamp=str(t + 30), event="click",
                             dwell_seconds=f"{rng.integers(5, 90)}.5"))
    rows.append(dict(rows[0], item_id="story99", event="click", timestamp=str(BASE + 10), position="1",
                     dwell_seconds="3", request_id="q0"))
    frame = pd.DataFrame(rows)
    order = list(range(len(frame)))
    order.insert(7, order[6])
    order.insert(14, order[13])
    return frame.iloc[order].reset_index(drop=True)


def write_formats(frame: pd.DataFrame, folder: Path) -> dict[str, Path]:
    """The same text log as CSV, one Parquet file, and a folder of two Parquet files."""
    folder.mkdir(parents=True, exist_ok=True)
    csv = folder / "events.csv"
    frame.to_csv(csv, index=False)
    table = pa.Table.from_pandas(frame.astype(object).where(frame != "", None), preserve_index=False)
    table = table.cast(pa.schema([pa.field(c, pa.string()) for c in frame.columns]))
    one = folder / "events.parquet"
    pq.write_table(table, one)
    parts = folder / "parts"
    parts.mkdir(exist_ok=True)
    half = len(frame) // 2
    pq.write_table(table.slice(0, half), parts / "part-0.parquet")
    pq.write_table(table.slice(half), parts / "part-1.parquet")
    return {"csv": csv, "parquet": one, "folder": parts}
