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


class RecordLines:
    """An append-only JSONL file of Records, each line complete and flushed as it is written
    (a crash loses no finished request), with labels added to every line if given. No
    folder: nothing is written."""

    def __init__(self, folder: Path | None, origin_ns: int, name: str = RECORDS_FILE) -> None:
        self.origin_ns = origin_ns
        self._handle: IO[bytes] | None = None
        if folder is not None:
            try:
                self._handle = open(folder / name, "ab")  # noqa: SIM115 - closed in close()
            except OSError as exc:
                raise StoreError(f"cannot open {folder / name}: {exc.strerror or exc}") from exc

    def write(self, record: Record, **labels: Any) -> None:
        if self._handle is None:
            return
        line = record.to_json(self.origin_ns)
        self._handle.write(jsonfast.dumps({**line, **labels} if labels else line) + b"\n")
        self._handle.flush()

    def close(self) -> None:
        if self._handle is not None:
            self._handle.close()
            self._handle = None


class RunFolder:
    def __init__(self, path: Path) -> None:
        self.path = path
        self._records: RecordLines | None = None

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
        self._records = RecordLines(self.path, origin_ns)

    def write_record(self, record: Record) -> None:
        """Append one complete line and flush it, so a crash loses no finished request."""
        if self._records is not None:
            self._records.write(record)

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
