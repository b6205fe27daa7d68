"""One summary row per analysed run (the many-files table, its CSV), and durations given on the command line."""

from __future__ import annotations

import re
from typing import Any

SUMMARY_COLUMNS = (
    "file", "protocol", "status", "steps_done", "steps_total", "determines",
    "purity", "purity_std", "concurrence", "concurrence_std", "fidelity", "fidelity_std",
    "polarization_S1", "polarization_S1_std", "polarization_S2", "polarization_S2_std",
    "polarization_S3", "polarization_S3_std",
    "spatial_S1", "spatial_S1_std", "spatial_S2", "spatial_S2_std", "spatial_S3", "spatial_S3_std",
    "power", "power_std", "power_units", "missing",
)

_DURATION = re.compile(r"^\s*(\d+(?:\.\d*)?|\.\d+)\s*(s|sec|min|m|h|d)?\s*$", re.IGNORECASE)
_SECONDS = {"s": 1.0, "sec": 1.0, "min": 60.0, "m": 60.0, "h": 3600.0, "d": 86400.0}


def parse_duration_s(text: str) -> float:
    """Seconds in a duration such as "900s", "30min", "45m", "2h", "1.5h", "1d" or "600" (s).

    Raises ValueError with the accepted forms when ``text`` is none of them or not above zero.
    """
    m = _DURATION.match(text)
    if not m or float(m.group(1)) <= 0:
        raise ValueError(
            f"{text!r} is not a duration; expected a number above 0 with an optional unit s, min (or m), h or d, "
            "e.g. 900s, 30min, 2h"
        )
    return float(m.group(1)) * _SECONDS[(m.group(2) or "s").lower()]


def _figure(doc: dict[str, Any], key: str) -> tuple[Any, Any]:
    x = doc.get(key)
    return (x["value"], x["std"]) if isinstance(x, dict) else (None, None)


def summary_row(file: str, doc: dict[str, Any]) -> dict[str, Any]:
    """The summary of one analysis document (or of an ``{"error": ...}`` entry) as a flat row."""
    row: dict[str, Any] = {k: None for k in SUMMARY_COLUMNS}
    row["file"] = file
    if "error" in doc and "run" not in doc:
        row["status"] = "unreadable"
        row["missing"] = doc["error"]
        return row
    run = doc.get("run", {})
    row.update(protocol=run.get("protocol"), status=run.get("status"), steps_done=run.get("steps_done"),
               steps_total=run.get("steps_total"), determines=doc.get("determines"))
    for key in ("purity", "concurrence", "fidelity", "power"):
        row[key], row[f"{key}_std"] = _figure(doc, key)
    if isinstance(doc.get("power"), dict):
        row["power_units"] = doc["power"].get("units")
    for factor, values in doc.get("stokes", {}).items():
        for k in (1, 2, 3):
            x = values[k] if k < len(values) else None
            if x is not None:
                row[f"{factor}_S{k}"], row[f"{factor}_S{k}_std"] = x["value"], x["std"]
    missing = doc.get("missing") or []
    row["missing"] = "; ".join(missing) if missing else None
    return row
