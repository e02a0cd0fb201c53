"""Exports: a run folder's records and summaries as tables, in CSV or Parquet (pandas).

- ``records``: one row per request, every field of records.jsonl plus derived latencies in
  milliseconds (ttft_ms, e2e_ms, tpot_ms, itl_p50_ms, itl_max_ms); in a comparison folder
  also the target, load level and round of each request.
- ``summaries``: one row per run (per round in a comparison), nested keys flattened with
  dots (``latency.ttft.p50_ms``); encoded histograms and per-second windows are left out.
- comparison folders add ``targets`` (per target and load level, over all rounds) and
  ``comparisons`` (one row per pair, metric and percentile, with interval and verdict).

Lists and tables that do not flatten (e.g. ``chunk_offsets_us``) are written as JSON text,
so that both formats hold the same columns. Parquet needs pyarrow (extra ``parquet``).
"""

from __future__ import annotations

import importlib.util
import json
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from loadrun.compare import COMPARE_FILE
from loadrun.errors import StoreError, UsageError
from loadrun.scale import worker_records
from loadrun.store import RECORDS_FILE, SUMMARY_FILE, RunFolder, read_records

if TYPE_CHECKING:  # pandas is imported when an export runs: it is slow to import
    import pandas as pd

__all__ = ["EXPORT_FORMATS", "export_folder", "records_frame", "summaries_frame"]

EXPORT_FORMATS = ("csv", "parquet")
_SUMMARY_DROP = ("histograms", "windows")


def records_frame(folder: str | Path) -> pd.DataFrame:
    """Every request of the folder (every round of a comparison), one row each."""
    import pandas as pd

    root = Path(folder)
    frames = []
    for labels, run in _runs(root):
        rows = read_records(run / RECORDS_FILE) if (run / RECORDS_FILE).is_file() else worker_records(run)
        if rows:
            frame = pd.DataFrame([_derived(row) for row in rows])
            for column, value in reversed(list(labels.items())):
                frame.insert(0, column, value)
            frames.append(frame)
    if not frames:
        return pd.DataFrame()
    return _flat_cells(pd.concat(frames, ignore_index=True))


def summaries_frame(folder: str | Path) -> pd.DataFrame:
    """One row per run summary (per round in a comparison), nested keys flattened."""
    import pandas as pd

    root = Path(folder)
    rows = []
    for labels, run in _runs(root):
        if not (run / SUMMARY_FILE).is_file():
            continue
        summary = RunFolder(run).read_json(SUMMARY_FILE)
        kept = {key: value for key, value in summary.items() if key not in _SUMMARY_DROP}
        rows.append({**labels, **_flatten(kept)})
    return _flat_cells(pd.DataFrame(rows))


def export_folder(folder: str | Path, fmt: str = "csv", out_dir: str | Path | None = None) -> list[Path]:
    """Write the folder's tables as ``<name>.<fmt>`` into ``out_dir`` (default: the folder)."""
    root = Path(folder)
    if not root.is_dir():
        raise UsageError(f"{root}: no such run folder")
    if fmt not in EXPORT_FORMATS:
        raise UsageError(f"unknown export format {fmt!r}; choose one of {', '.join(EXPORT_FORMATS)}")
    if fmt == "parquet" and importlib.util.find_spec("pyarrow") is None:
        raise UsageError("Parquet export needs pyarrow: pip install 'loadrun[parquet]'")
    tables = {"records": records_frame(root), "summaries": summaries_frame(root)}
    if (root / COMPARE_FILE).is_file():
        data = RunFolder(root).read_json(COMPARE_FILE)
        tables["targets"] = _targets_frame(data)
        tables["comparisons"] = _comparisons_frame(data)
    if all(frame.empty for frame in tables.values()):
        raise UsageError(f"{root}: nothing to export (no records or summaries)")
    destination = Path(out_dir) if out_dir is not None else root
    written = []
    try:
        destination.mkdir(parents=True, exist_ok=True)
        for name, frame in tables.items():
            path = destination / f"{name}.{fmt}"
            if fmt == "csv":
                frame.to_csv(path, index=False)
            else:
                frame.to_parquet(path, index=False, engine="pyarrow")
            written.append(path)
    except OSError as exc:
        raise StoreError(f"cannot write exports to {destination}: {exc.strerror or exc}") from exc
    return written


def _runs(root: Path) -> list[tuple[dict[str, Any], Path]]:
    """(labels, run folder) of every run the folder holds: the rounds of a comparison, or itself."""
    if (root / COMPARE_FILE).is_file():
        data = RunFolder(root).read_json(COMPARE_FILE)
        return [
            (
                {
                    "target": entry.get("target"),
                    "concurrency": entry.get("level"),
                    "round": entry.get("round"),
                },
                root / entry["folder"],
            )
            for entry in data.get("rounds", [])
        ]
    return [({}, root)]


def _derived(row: Mapping[str, Any]) -> dict[str, Any]:
    out = dict(row)
    intended, first, end = row.get("intended_us"), row.get("first_token_us"), row.get("end_us")
    tokens = int(row.get("output_tokens") or 0)
    out["ttft_ms"] = (first - intended) / 1000 if first is not None and intended is not None else None
    out["e2e_ms"] = (end - intended) / 1000 if end is not None and intended is not None else None
    out["tpot_ms"] = (
        (end - first) / (tokens - 1) / 1000 if end is not None and first is not None and tokens >= 2 else None
    )
    offsets = row.get("chunk_offsets_us") or []
    gaps = np.diff(np.asarray(offsets, dtype=np.float64)) / 1000 if len(offsets) > 1 else np.empty(0)
    out["itl_p50_ms"] = float(np.median(gaps)) if gaps.size else None
    out["itl_max_ms"] = float(gaps.max()) if gaps.size else None
    send = row.get("send_us")
    out["send_lag_ms"] = max(0, send - intended) / 1000 if send is not None and intended is not None else None
    return out


def _targets_frame(data: Mapping[str, Any]) -> pd.DataFrame:
    import pandas as pd

    rows = []
    for level in data.get("levels", []):
        for name, aggregate in level.get("targets", {}).items():
            rows.append({"target": name, "concurrency": level.get("concurrency"), **_flatten(aggregate)})
    return _flat_cells(pd.DataFrame(rows))


def _comparisons_frame(data: Mapping[str, Any]) -> pd.DataFrame:
    import pandas as pd

    rows = []
    for level in data.get("levels", []):
        for pair in level.get("pairs", []):
            for metric in pair.get("metrics", []):
                rows.append(
                    {
                        "concurrency": level.get("concurrency"),
                        "a": pair.get("a"),
                        "b": pair.get("b"),
                        "pair_verdict": pair.get("verdict"),
                        **metric,
                    }
                )
    return _flat_cells(pd.DataFrame(rows))


def _flatten(data: Mapping[str, Any], prefix: str = "") -> dict[str, Any]:
    flat: dict[str, Any] = {}
    for key, value in data.items():
        name = f"{prefix}{key}"
        if isinstance(value, Mapping) and value:
            flat.update(_flatten(value, name + "."))
        else:
            flat[name] = value
    return flat


def _flat_cells(frame: pd.DataFrame) -> pd.DataFrame:
    """Lists and tables become JSON text, so CSV and Parquet hold the same columns."""
    for column in frame.columns:
        if frame[column].map(lambda cell: isinstance(cell, (list, dict, tuple))).any():
            frame[column] = frame[column].map(_json_cell)
    return frame


def _json_cell(cell: Any) -> Any:
    if isinstance(cell, (list, dict, tuple)):
        return json.dumps(cell, sort_keys=True)
    return cell
