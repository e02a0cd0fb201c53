"""Run folders on disk: records as JSONL (one complete line per finished request, flushed),
the resolved configuration, and the summary written atomically at the end.
"""

from __future__ import annotations

import os
import re
import time
from pathlib import Path
from typing import IO, Any

from loadrun import jsonfast
from loadrun.errors import StoreError
from loadrun.record import Record

RECORDS_FILE = "records.jsonl"
SUMMARY_FILE = "summary.json"
CONFIG_FILE = "config.json"


class RunFolder:
    def __init__(self, path: Path) -> None:
        self.path = path
        self._records: IO[bytes] | None = None
        self.origin_ns = 0

    @classmethod
    def create(cls, root: str | Path, label: str) -> RunFolder:
        stamp = time.strftime("%Y%m%d-%H%M%S")
        safe = re.sub(r"[^A-Za-z0-9._-]+", "-", label).strip("-") or "run"
        base = Path(root)
        try:
            base.mkdir(parents=True, exist_ok=True)
            for attempt in range(1000):
                suffix = f"-{attempt}" if attempt else ""
                path = base / f"{stamp}-{safe}{suffix}"
                try:
                    path.mkdir()
                except FileExistsError:
                    continue
                return cls(path)
        except OSError as exc:
            raise StoreError(f"cannot create a run folder under {base}: {exc.strerror or exc}") from exc
        raise StoreError(f"cannot find a free run folder name under {base}")

    # records ------------------------------------------------------------------------
    def open_records(self, origin_ns: int) -> None:
        self.origin_ns = origin_ns
        try:
            self._records = open(self.path / RECORDS_FILE, "ab")  # noqa: SIM115 - closed in close()
        except OSError as exc:
            raise StoreError(f"cannot open {self.path / RECORDS_FILE}: {exc.strerror or exc}") from exc

    def write_record(self, record: Record) -> None:
        """Append one complete line and flush it, so a crash loses no finished request."""
        if self._records is None:
            return
        self._records.write(jsonfast.dumps(record.to_json(self.origin_ns)) + b"\n")
        self._records.flush()

    def close(self) -> None:
        if self._records is not None:
            self._records.close()
            self._records = None

    # whole files ----------------------------------------------------------------------
    def write_json(self, name: str, data: Any) -> Path:
        """Write ``name`` atomically: a reader sees the old file or the new one, never half."""
        target = self.path / name
        temporary = target.with_name(f".{name}.tmp")
        try:
            with open(temporary, "wb") as handle:
                handle.write(jsonfast_pretty(data))
                handle.flush()
                os.fsync(handle.fileno())
            os.replace(temporary, target)
        except OSError as exc:
            raise StoreError(f"cannot write {target}: {exc.strerror or exc}") from exc
        return target

    def read_json(self, name: str) -> Any:
        try:
            return jsonfast.loads((self.path / name).read_bytes())
        except (OSError, ValueError) as exc:
            raise StoreError(f"cannot read {self.path / name}: {exc}") from exc


def jsonfast_pretty(data: Any) -> bytes:
    try:
        import orjson

        return orjson.dumps(data, option=orjson.OPT_INDENT_2 | orjson.OPT_SERIALIZE_NUMPY) + b"\n"
    except ImportError:  # pragma: no cover
        import json

        return (json.dumps(data, indent=2) + "\n").encode()


def read_records(path: str | Path) -> list[dict[str, Any]]:
    """All complete lines of a records file (a torn last line, if any, is skipped)."""
    rows = []
    with open(path, "rb") as handle:
        for line in handle:
            if line.endswith(b"\n"):
                rows.append(jsonfast.loads(line))
    return rows
