"""The history database: every measured run in one local SQLite file.

    runs        one row per run: when, the target (name, URL without credentials, model),
                the profile (name and a hash of everything that shapes the load), the
                resolved configuration, the summary, the environment, the gate's verdict
    histograms  the run's encoded HdrHistograms, one row per metric

Safety under concurrent and interrupted writers:

- WAL journal mode: readers never block the writer, and a writer never blocks readers;
- one run is written in one ``BEGIN IMMEDIATE`` transaction (its row and its histograms),
  so a process killed mid-write leaves the run wholly in the file or not at all;
- a busy timeout: two runs finishing at once take turns instead of failing.

A run's target name and profile hash are the key under which the gate looks for its
baselines; ``started_unix`` orders runs, and the row id breaks ties.
"""

from __future__ import annotations

import contextlib
import hashlib
import json
import os
import platform
import re
import socket
import sqlite3
import sys
import time
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime
from pathlib import Path
from types import TracebackType
from typing import Any
from urllib.parse import parse_qsl, urlencode, urlsplit, urlunsplit

from loadrun._version import __version__
from loadrun.errors import StoreError, UsageError
from loadrun.metrics import LATENCY_METRICS, HistogramSet, LatencyHistogram

__all__ = [
    "BASELINE_VERDICTS",
    "HISTORY_FILE",
    "History",
    "HistoryRun",
    "MetricPercentile",
    "RunFilter",
    "TrendRow",
    "parse_since",
    "profile_hash",
    "record_run",
    "strip_credentials",
    "trend",
]

HISTORY_FILE = "history.sqlite3"
"""The database's file name beside the run folders (``runs/history.sqlite3`` by default)."""
SCHEMA_VERSION = 1
BUSY_TIMEOUT_S = 30.0
BASELINE_VERDICTS = ("pass", "no_baseline")
"""Gate verdicts of runs that may serve as baselines: passed, or the first of their kind."""

_SCHEMA = """
CREATE TABLE IF NOT EXISTS runs (
    id INTEGER PRIMARY KEY,
    run_folder TEXT UNIQUE,
    started_at TEXT NOT NULL,
    started_unix REAL NOT NULL,
    recorded_unix REAL NOT NULL,
    loadrun_version TEXT NOT NULL,
    target_name TEXT NOT NULL,
    target_url TEXT NOT NULL,
    model TEXT NOT NULL,
    profile_name TEXT NOT NULL,
    profile_hash TEXT NOT NULL,
    concurrency INTEGER,
    verdict TEXT,
    pinned INTEGER NOT NULL DEFAULT 0,
    config_json TEXT NOT NULL,
    summary_json TEXT NOT NULL,
    environment_json TEXT NOT NULL,
    gate_json TEXT
);
CREATE INDEX IF NOT EXISTS runs_by_key ON runs (target_name, profile_hash, started_unix);
CREATE TABLE IF NOT EXISTS histograms (
    run_id INTEGER NOT NULL REFERENCES runs (id) ON DELETE CASCADE,
    metric TEXT NOT NULL,
    encoded TEXT NOT NULL,
    PRIMARY KEY (run_id, metric)
);
"""

_SECRET_QUERY_KEY = re.compile(r"key|token|secret|sig|pass|auth|cred", re.IGNORECASE)


def strip_credentials(url: str) -> str:
    """The URL without user information and with secret-looking query values masked."""
    parts = urlsplit(url)
    host = parts.hostname or ""
    if ":" in host:
        host = f"[{host}]"
    netloc = f"{host}:{parts.port}" if parts.port else host
    query = urlencode(
        [
            (name, "REDACTED" if _SECRET_QUERY_KEY.search(name) else value)
            for name, value in parse_qsl(parts.query, keep_blank_values=True)
        ]
    )
    return urlunsplit((parts.scheme, netloc, parts.path, query, ""))


def profile_hash(config: Mapping[str, Any]) -> str:
    """Hash of what shapes the load: the resolved profile and load plan, not file paths or limits.

    Two runs with equal hashes sent the same requests in the same way, so their latencies
    may be compared; any change to the profile or the load level starts a new baseline.
    """
    profile = {key: value for key, value in dict(config.get("profile") or {}).items() if key != "source"}
    load = {key: value for key, value in dict(config.get("load") or {}).items() if key != "time_limit_s"}
    canonical = json.dumps({"profile": profile, "load": load}, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canonical.encode()).hexdigest()[:16]


def environment() -> dict[str, Any]:
    """Where the run was measured (nothing secret: no environment variables are read)."""
    return {
        "loadrun_version": __version__,
        "python": platform.python_version(),
        "platform": platform.platform(),
        "machine": platform.machine(),
        "host": socket.gethostname(),
        "cpus": os.cpu_count(),
        "argv0": Path(sys.argv[0]).name if sys.argv and sys.argv[0] else None,
    }


@dataclass(frozen=True, slots=True)
class MetricPercentile:
    """One percentile of one latency metric, written ``ttft.p95``."""

    metric: str
    percentile: float

    @classmethod
    def parse(cls, text: str) -> MetricPercentile:
        metric, sep, pct = text.strip().lower().partition(".p")
        if not sep or metric not in LATENCY_METRICS:
            raise UsageError(
                f"{text!r}: write METRIC.pNN, e.g. ttft.p95, with METRIC one of {', '.join(LATENCY_METRICS)}"
            )
        try:
            percentile = float(pct)
        except ValueError as exc:
            raise UsageError(f"{text!r}: {pct!r} is not a percentile") from exc
        if not 0.0 < percentile < 100.0:
            raise UsageError(f"{text!r}: the percentile must lie between 0 and 100")
        return cls(metric, percentile)

    @property
    def label(self) -> str:
        return f"{self.metric}.p{self.percentile:g}"


@dataclass(frozen=True, slots=True)
class HistoryRun:
    """One stored run, as read back."""

    id: int
    run_folder: str | None
    started_at: str
    started_unix: float
    loadrun_version: str
    target_name: str
    target_url: str
    model: str
    profile_name: str
    profile_hash: str
    concurrency: int | None
    verdict: str | None
    pinned: bool
    config: dict[str, Any]
    summary: dict[str, Any]
    environment: dict[str, Any]
    gate: dict[str, Any] | None

    def brief(self) -> dict[str, Any]:
        """The columns of a listing (no histograms, no full summary)."""
        requests = self.summary.get("requests", {})
        latency = self.summary.get("latency", {})
        return {
            "id": self.id,
            "started_at": self.started_at,
            "target": self.target_name,
            "model": self.model,
            "profile": self.profile_name,
            "profile_hash": self.profile_hash,
            "concurrency": self.concurrency,
            "measured": requests.get("measured"),
            "failed": requests.get("failed"),
            "ttft_p95_ms": latency.get("ttft", {}).get("p95_ms"),
            "e2e_p95_ms": latency.get("e2e", {}).get("p95_ms"),
            "verdict": self.verdict,
            "pinned": self.pinned,
            "run_folder": self.run_folder,
        }


@dataclass(frozen=True, slots=True)
class RunFilter:
    target: str | None = None
    profile: str | None = None
    """A profile name, or the start of a profile hash."""
    verdict: str | None = None
    since_unix: float | None = None
    limit: int = 50
    """The most recent runs kept; the result is in time order, oldest first."""


@dataclass(frozen=True, slots=True)
class TrendRow:
    run: HistoryRun
    values_ms: dict[str, float | None]
    """Label (e.g. ``ttft.p95``) -> the run's value in ms, None when it has no samples."""


_COLUMNS = (
    "id, run_folder, started_at, started_unix, loadrun_version, target_name, target_url, model, "
    "profile_name, profile_hash, concurrency, verdict, pinned, config_json, summary_json, "
    "environment_json, gate_json"
)


class History:
    """An open history database; use as a context manager, in one thread."""

    def __init__(self, path: str | Path, *, create: bool = True) -> None:
        self.path = Path(path)
        if not create and not self.path.is_file():
            raise UsageError(f"no history database at {self.path} (runs write it as they finish)")
        try:
            if create:
                self.path.parent.mkdir(parents=True, exist_ok=True)
            # Autocommit mode: every write below opens its own explicit transaction.
            self._db = sqlite3.connect(self.path, timeout=BUSY_TIMEOUT_S, isolation_level=None)
        except (OSError, sqlite3.Error) as exc:
            raise StoreError(f"cannot open the history database {self.path}: {exc}") from exc
        try:
            self._prepare()
        except sqlite3.Error as exc:
            self._db.close()
            raise StoreError(f"{self.path} is not a usable history database: {exc}") from exc

    def _prepare(self) -> None:
        db = self._db
        db.execute("PRAGMA foreign_keys = ON")
        mode = db.execute("PRAGMA journal_mode = WAL").fetchone()[0]
        if str(mode).lower() != "wal":
            raise sqlite3.OperationalError(f"journal mode {mode!r} instead of WAL")
        # In WAL mode NORMAL never corrupts the file; a power cut may drop the newest runs.
        db.execute("PRAGMA synchronous = NORMAL")
        version = db.execute("PRAGMA user_version").fetchone()[0]
        if version > SCHEMA_VERSION:
            raise sqlite3.DatabaseError(
                f"written by a newer loadrun (schema {version}, this one knows {SCHEMA_VERSION})"
            )
        if version < SCHEMA_VERSION:
            # Statement by statement: executescript() would commit the open transaction.
            with self._transaction():
                for statement in _statements(_SCHEMA):
                    db.execute(statement)
                db.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")

    def close(self) -> None:
        self._db.close()

    def __enter__(self) -> History:
        return self

    def __exit__(
        self,
        exc_type: type[BaseException] | None,
        exc: BaseException | None,
        traceback: TracebackType | None,
    ) -> None:
        self.close()

    @contextlib.contextmanager
    def _transaction(self) -> Iterator[sqlite3.Connection]:
        """BEGIN IMMEDIATE takes the write lock at once, so a busy writer waits here, not mid-way."""
        try:
            self._db.execute("BEGIN IMMEDIATE")
        except sqlite3.Error as exc:
            raise StoreError(f"cannot write the history database {self.path}: {exc}") from exc
        try:
            yield self._db
        except BaseException as exc:
            self._db.execute("ROLLBACK")
            if isinstance(exc, sqlite3.Error):
                raise StoreError(f"cannot write the history database {self.path}: {exc}") from exc
            raise
        try:
            self._db.execute("COMMIT")
        except sqlite3.Error as exc:
            raise StoreError(f"cannot commit to the history database {self.path}: {exc}") from exc

    # writing --------------------------------------------------------------------------
    def record(
        self,
        summary: Mapping[str, Any],
        config: Mapping[str, Any],
        *,
        target_name: str | None = None,
        verdict: str | None = None,
        gate: Mapping[str, Any] | None = None,
    ) -> int:
        """Store one run (or, for a run folder already stored, its new verdict); returns its id."""
        target = dict(config.get("target") or {})
        profile = dict(config.get("profile") or {})
        started_at = str(config.get("started_at") or time.strftime("%Y-%m-%dT%H:%M:%S%z"))
        folder = summary.get("run_folder")
        folder_key = str(Path(folder).resolve()) if folder else None
        histograms = dict(summary.get("histograms") or {})
        stored_summary = _scrubbed({key: value for key, value in summary.items() if key != "histograms"})
        config = _scrubbed(dict(config))
        name = target_name or str(target.get("name") or "target")
        gate_text = _dumps(gate) if gate is not None else None
        try:
            with self._transaction() as db:
                if folder_key is not None:
                    row = db.execute("SELECT id FROM runs WHERE run_folder = ?", (folder_key,)).fetchone()
                    if row is not None:
                        db.execute(
                            "UPDATE runs SET target_name = ?, verdict = ?, gate_json = ? WHERE id = ?",
                            (name, verdict, gate_text, row[0]),
                        )
                        return int(row[0])
                cursor = db.execute(
                    "INSERT INTO runs (run_folder, started_at, started_unix, recorded_unix, loadrun_version,"
                    " target_name, target_url, model, profile_name, profile_hash, concurrency, verdict,"
                    " config_json, summary_json, environment_json, gate_json)"
                    " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                    (
                        folder_key,
                        started_at,
                        _unix_time(started_at),
                        time.time(),
                        str(config.get("loadrun_version") or __version__),
                        name,
                        strip_credentials(str(target.get("base_url") or "")),
                        str(target.get("model") or ""),
                        str(profile.get("name") or "profile"),
                        profile_hash(config),
                        _int_or_none(dict(config.get("load") or {}).get("concurrency")),
                        verdict,
                        _dumps(config),
                        _dumps(stored_summary),
                        _dumps(environment()),
                        gate_text,
                    ),
                )
                run_id = int(cursor.lastrowid or 0)
                db.executemany(
                    "INSERT INTO histograms (run_id, metric, encoded) VALUES (?, ?, ?)",
                    [(run_id, metric, str(encoded)) for metric, encoded in histograms.items()],
                )
                return run_id
        except sqlite3.Error as exc:
            raise StoreError(f"cannot write the history database {self.path}: {exc}") from exc

    def pin(self, run_id: int, pinned: bool = True) -> HistoryRun:
        """Make a run the baseline of its target and profile (the one pin of that pair), or unpin it."""
        run = self.get(run_id)
        with self._transaction() as db:
            if pinned:
                db.execute(
                    "UPDATE runs SET pinned = 0 WHERE target_name = ? AND profile_hash = ?",
                    (run.target_name, run.profile_hash),
                )
            db.execute("UPDATE runs SET pinned = ? WHERE id = ?", (int(pinned), run_id))
        return self.get(run_id)

    # reading --------------------------------------------------------------------------
    def get(self, run_id: int) -> HistoryRun:
        rows = self._select(f"SELECT {_COLUMNS} FROM runs WHERE id = ?", (run_id,))
        if not rows:
            raise UsageError(f"no run {run_id} in the history database {self.path}")
        return rows[0]

    def find(self, where: RunFilter = RunFilter()) -> list[HistoryRun]:
        clauses: list[str] = []
        params: list[Any] = []
        if where.target is not None:
            clauses.append("target_name = ?")
            params.append(where.target)
        if where.profile is not None:
            clauses.append("(profile_name = ? OR profile_hash LIKE ?)")
            params += [where.profile, where.profile.lower() + "%"]
        if where.verdict is not None:
            clauses.append("verdict IS ?" if where.verdict == "none" else "verdict = ?")
            params.append(None if where.verdict == "none" else where.verdict)
        if where.since_unix is not None:
            clauses.append("started_unix >= ?")
            params.append(where.since_unix)
        condition = f"WHERE {' AND '.join(clauses)}" if clauses else ""
        rows = self._select(
            f"SELECT {_COLUMNS} FROM runs {condition} ORDER BY started_unix DESC, id DESC LIMIT ?",
            (*params, max(1, where.limit)),
        )
        return rows[::-1]

    def pinned_run(self, target_name: str, profile_hash: str) -> HistoryRun | None:
        rows = self._select(
            f"SELECT {_COLUMNS} FROM runs WHERE target_name = ? AND profile_hash = ? AND pinned = 1"
            " ORDER BY id DESC LIMIT 1",
            (target_name, profile_hash),
        )
        return rows[0] if rows else None

    def passing_runs(
        self, target_name: str, profile_hash: str, last: int, exclude_id: int | None = None
    ) -> list[HistoryRun]:
        """The ``last`` most recent runs of this target and profile whose gate let them pass."""
        marks = ", ".join("?" for _ in BASELINE_VERDICTS)
        return self._select(
            f"SELECT {_COLUMNS} FROM runs WHERE target_name = ? AND profile_hash = ?"
            f" AND verdict IN ({marks}) AND id IS NOT ? ORDER BY started_unix DESC, id DESC LIMIT ?",
            (target_name, profile_hash, *BASELINE_VERDICTS, exclude_id, max(1, last)),
        )

    def id_for_folder(self, folder: str | Path) -> int | None:
        """The id of the run stored from this run folder, if any."""
        try:
            row = self._db.execute(
                "SELECT id FROM runs WHERE run_folder = ?", (str(Path(folder).resolve()),)
            ).fetchone()
        except sqlite3.Error as exc:
            raise StoreError(f"cannot read the history database {self.path}: {exc}") from exc
        return int(row[0]) if row else None

    def histograms(self, run_id: int) -> HistogramSet:
        try:
            rows = self._db.execute(
                "SELECT metric, encoded FROM histograms WHERE run_id = ? ORDER BY rowid", (run_id,)
            ).fetchall()
        except sqlite3.Error as exc:
            raise StoreError(f"cannot read the history database {self.path}: {exc}") from exc
        return HistogramSet.decode({str(metric): str(encoded) for metric, encoded in rows})

    def integrity(self) -> str:
        """SQLite's own full check of the file: ``ok`` when sound."""
        try:
            return str(self._db.execute("PRAGMA integrity_check").fetchone()[0])
        except sqlite3.Error as exc:
            raise StoreError(f"cannot check the history database {self.path}: {exc}") from exc

    def _select(self, query: str, params: Sequence[Any]) -> list[HistoryRun]:
        try:
            rows = self._db.execute(query, tuple(params)).fetchall()
        except sqlite3.Error as exc:
            raise StoreError(f"cannot read the history database {self.path}: {exc}") from exc
        return [_run_from_row(row) for row in rows]


def parse_since(text: str, now: float | None = None) -> float:
    """``2026-01-31`` (local midnight), ``2026-01-31T08:00``, or an age: ``36h``, ``7d``, ``2w``."""
    clock = time.time() if now is None else now
    value = text.strip().lower()
    match = re.fullmatch(r"(\d+(?:\.\d+)?)([hdw])", value)
    if match:
        hours = float(match[1]) * {"h": 1, "d": 24, "w": 168}[match[2]]
        return clock - hours * 3600.0
    for layout in ("%Y-%m-%d", "%Y-%m-%dT%H:%M", "%Y-%m-%dT%H:%M:%S"):
        try:
            return time.mktime(time.strptime(value.upper(), layout))
        except ValueError:
            continue
    raise UsageError(f"--since {text!r}: write a date (2026-01-31, 2026-01-31T08:00) or an age (36h, 7d, 2w)")


def record_run(
    path: str | Path,
    summary: Mapping[str, Any],
    config: Mapping[str, Any],
    **fields: Any,
) -> int:
    """Open the database, store one run, close it (what the runner calls after every run)."""
    with History(path) as history:
        return history.record(summary, config, **fields)


def trend(history: History, runs: Sequence[HistoryRun], series: Sequence[MetricPercentile]) -> list[TrendRow]:
    """The chosen percentiles of each run, read from its stored histograms."""
    rows = []
    for run in runs:
        histograms = history.histograms(run.id)
        values: dict[str, float | None] = {}
        for item in series:
            values[item.label] = _percentile_ms(histograms, item)
        rows.append(TrendRow(run, values))
    return rows


def _percentile_ms(histograms: HistogramSet, item: MetricPercentile) -> float | None:
    try:
        histogram: LatencyHistogram = histograms.get(item.metric)
    except KeyError:
        return None
    if not histogram.count:
        return None
    return histogram.percentile_us(item.percentile) / 1000.0


def _scrubbed(data: Any) -> Any:
    """A copy with every URL passed through strip_credentials, wherever it sits."""
    if isinstance(data, str):
        return strip_credentials(data) if data.startswith(("http://", "https://")) else data
    if isinstance(data, Mapping):
        return {key: _scrubbed(value) for key, value in data.items()}
    if isinstance(data, list | tuple):
        return [_scrubbed(value) for value in data]
    return data


def _statements(script: str) -> list[str]:
    return [statement.strip() for statement in script.split(";") if statement.strip()]


def _run_from_row(row: Sequence[Any]) -> HistoryRun:
    return HistoryRun(
        id=int(row[0]),
        run_folder=row[1],
        started_at=str(row[2]),
        started_unix=float(row[3]),
        loadrun_version=str(row[4]),
        target_name=str(row[5]),
        target_url=str(row[6]),
        model=str(row[7]),
        profile_name=str(row[8]),
        profile_hash=str(row[9]),
        concurrency=_int_or_none(row[10]),
        verdict=row[11],
        pinned=bool(row[12]),
        config=json.loads(row[13]),
        summary=json.loads(row[14]),
        environment=json.loads(row[15]),
        gate=json.loads(row[16]) if row[16] is not None else None,
    )


def _dumps(data: Any) -> str:
    return json.dumps(data, sort_keys=True, default=str)


def _unix_time(stamp: str) -> float:
    try:
        return datetime.strptime(stamp, "%Y-%m-%dT%H:%M:%S%z").timestamp()
    except ValueError:
        return time.time()


def _int_or_none(value: Any) -> int | None:
    return int(value) if isinstance(value, int | float) and not isinstance(value, bool) else None
