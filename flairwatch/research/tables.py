"""Tables for research staff as bytes: CSV and JSON with a fixed column order (pure functions).

Used by ``export`` (one row per series, or per participant and scan with ``--longitudinal``) and
by the change report of a re-run.
"""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Sequence
from typing import Any


def csv_bytes(rows: Sequence[dict[str, Any]], columns: Sequence[str]) -> bytes:
    """CSV (RFC 4180 quoting, LF line ends, UTF-8), header row first; None becomes empty."""
    buf = io.StringIO()
    writer = csv.DictWriter(buf, fieldnames=list(columns), lineterminator="\n")
    writer.writeheader()
    for row in rows:
        writer.writerow({c: "" if row.get(c) is None else row.get(c) for c in columns})
    return buf.getvalue().encode("utf-8")


def json_bytes(rows: Sequence[dict[str, Any]], columns: Sequence[str]) -> bytes:
    """A JSON array of objects with the columns in order; missing values are null."""
    ordered = [{c: row.get(c) for c in columns} for row in rows]
    return (json.dumps(ordered, indent=1, ensure_ascii=False) + "\n").encode("utf-8")
