"""One load level across several worker processes or a Dask cluster, merged into one run.

    from loadrun import MeasureSettings, measure_scaled
    result = measure_scaled(MeasureSettings(concurrency=8, duration_s=10), workers=2)
    result.summary["workers"]["start_skew_ms"]

The coordinator resolves the target (with none given it starts ONE embedded mock that
every worker loads), splits the level (shards.py), runs the shards on local processes
(worker_processes.py) or on a Dask cluster (cluster.py), and merges their summaries
(shard_merge.py) into an ordinary run folder: config.json and summary.json at the top,
each worker's own run folder (records, config, summary) under ``workers/w<N>/``. The
summary's ``workers`` section lists per-worker counts, start skew, health and record
files (relative to the run folder when inside it); a worker that died makes the run
incomplete, and its flushed records are kept.
"""

from __future__ import annotations

import socket
import time
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path
from typing import Any

from loadrun.errors import LoadrunError, UsageError
from loadrun.history import record_run
from loadrun.interrupt import ForwardedStop, forwarded_stop
from loadrun.runner import (
    MeasureSettings,
    RunResult,
    level_label,
    plan_json,
    target_for,
)
from loadrun.shard_merge import merge_summaries, window_medians
from loadrun.shard_worker import ShardResult
from loadrun.shards import ShardSpec, split_settings
from loadrun.store import CONFIG_FILE, RECORDS_FILE, SUMMARY_FILE, RunFolder, read_records

__all__ = ["START_SKEW_TOLERANCE_MS", "WorkersStarted", "measure_scaled", "worker_records"]

START_SKEW_TOLERANCE_MS = 50.0
"""Shards' load must begin within this of each other (common practice, no source: a small
share of a one-second window). On several machines it includes their clock offset (NTP)."""
SETUP_ALLOWANCE_S = 60.0
"""Beyond the time limit and the stop grace: a shard's set-up (connect, calibration probe)."""
START_LEAD_S = {"processes": 0.5, "dask": 1.0}
"""From the workers' ready (processes) or the submission (Dask) to the agreed start: each
worker checks the target and writes its config before the instant comes."""
CALIBRATION_LEAD_S = 10.0
"""More lead when every worker first probes the target's token count (a few requests)."""
_CONFIG_KEYS = (
    "loadrun_version",
    "target",
    "context_window",
    "transport",
    "receive_clock",
    "slos",
    "timeouts",
    "retry_rate_limited",
    "stop_grace_s",
    "input_calibration",
)

WorkersStarted = Callable[[list[int]], None]
"""Sees the local worker PIDs once all are ready (tests use it to stop one)."""


def measure_scaled(
    settings: MeasureSettings,
    workers: int | None,
    cluster: str | None = None,
    *,
    on_started: WorkersStarted | None = None,
) -> RunResult:
    """Run one load level split across ``workers`` shards: local processes, or the Dask
    cluster at ``cluster`` (one shard per Dask worker; None: as many as it has). Blocking."""
    plan = settings.check()
    if workers is None:
        if cluster is None:
            raise UsageError("say how many workers (--workers), or give a cluster address")
        from loadrun.cluster import cluster_size

        workers = cluster_size(cluster, settings.connect_timeout_s)
    with target_for(settings) as (target, mock_info):
        if not target.is_loopback and not settings.confirmed:
            raise UsageError(
                f"{target.base_url} is not on this machine: confirm that you may load it (--yes)"
            )
        profile = settings.effective_profile()
        label = f"{profile.name}-{level_label(plan)}-x{workers}"
        folder = RunFolder.create(settings.out_dir, label) if settings.out_dir is not None else None
        # Absolute: a Dask worker on this machine runs in a working directory of its own.
        shard_root = str(folder.path.resolve() / "workers") if folder is not None else None
        specs = split_settings(replace(settings, target=target), workers, shard_root)
        deadline = settings.time_limit_s + settings.stop_grace_s + SETUP_ALLOWANCE_S
        extra = CALIBRATION_LEAD_S if settings.wants_calibration() else 0.0
        started_at = time.strftime("%Y-%m-%dT%H:%M:%S%z")
        children = (int(mock_info["pid"]),) if mock_info else ()
        stop: ForwardedStop | None = None
        if cluster is None:
            from loadrun.worker_processes import run_on_processes

            lead = START_LEAD_S["processes"] + extra
            with forwarded_stop(children, enabled=settings.handle_signals) as stop:
                results, start_at = run_on_processes(specs, deadline, lead, on_started=on_started, stop=stop)
        else:
            from loadrun.cluster import run_on_dask

            lead = START_LEAD_S["dask"] + extra
            with forwarded_stop(children, enabled=settings.handle_signals) as stop:
                results, start_at = run_on_dask(
                    cluster, specs, deadline, lead, settings.connect_timeout_s, stop=stop
                )
        finished = [result for result in results if result.finished]
        problems = [str(result.error) for result in results if not result.finished]
        if not finished:
            raise LoadrunError("no worker finished: " + "; ".join(problems))
        first = finished[0].summary
        assert first is not None
        config = {key: first[key] for key in _CONFIG_KEYS if key in first}
        config.update(
            started_at=started_at,
            embedded_mock=mock_info,
            profile=profile.describe(),
            load=plan_json(plan),
        )
        records = _record_files(specs, results)
        section = _workers_section(specs, results, records, start_at, cluster, problems)
        if folder is not None:
            for shard in section["shards"]:
                shard["folder"] = _inside(folder.path, shard["folder"])
                shard["records"] = _inside(folder.path, shard["records"])
        config["workers"] = {key: section[key] for key in ("count", "mode", "cluster")}
        summary: dict[str, Any] = {
            **config,
            "run_folder": str(folder.path) if folder is not None else None,
            **merge_summaries([result.summary for result in finished if result.summary is not None]),
        }
        finished_files = [records[result.index] for result in finished]
        if folder is not None and all(path is not None for path in finished_files):
            medians = window_medians(path for path in finished_files if path is not None)
            for window in summary["windows"]:
                window["ttft_p50_ms"], window["e2e_p50_ms"] = medians.get(window["second"], (None, None))
        summary["workers"] = section
        if stop is not None and stop.signal_name is not None:
            summary["interrupted"] = True
            summary["interrupt"] = {"signal": stop.signal_name, "grace_s": settings.stop_grace_s}
        history_id = None
        if folder is not None:
            folder.write_json(CONFIG_FILE, config)
            folder.write_json(SUMMARY_FILE, summary)
        history = settings.history_file()
        if history is not None:
            history_id = record_run(history, summary, config)
        return RunResult(summary, folder.path if folder is not None else None, history_id, config)


def _record_files(specs: list[ShardSpec], results: list[ShardResult]) -> dict[int, Path | None]:
    """Each shard's records file on this machine: its own, one it sent back, or what a dead
    worker left behind (None: not on this machine)."""
    files: dict[int, Path | None] = {}
    for spec, result in zip(specs, results, strict=True):
        path: Path | None = None
        if result.records is not None and spec.out_dir is not None:
            local = Path(spec.out_dir) / "from-remote"
            local.mkdir(parents=True, exist_ok=True)
            path = local / RECORDS_FILE
            path.write_bytes(result.records)
        elif result.folder is not None and (Path(result.folder) / RECORDS_FILE).is_file():
            path = Path(result.folder) / RECORDS_FILE
        elif spec.out_dir is not None:
            left = sorted(Path(spec.out_dir).glob(f"*/{RECORDS_FILE}"))
            path = left[-1] if left else None
        files[spec.index] = path
    return files


def _load_origin_wall(path: Path | None) -> tuple[float | None, int]:
    """(wall-clock time of the shard's origin, records) from its records: each record has its
    send's wall time and its send's offset from the origin."""
    if path is None:
        return None, 0
    rows = read_records(path)
    origins = [
        float(row["wall_start"]) - float(row["send_us"]) / 1e6
        for row in rows
        if row.get("wall_start") and row.get("send_us") is not None
    ]
    return (min(origins) if origins else None), len(rows)


def _workers_section(
    specs: list[ShardSpec],
    results: list[ShardResult],
    records: dict[int, Path | None],
    start_at: float,
    cluster: str | None,
    problems: list[str],
) -> dict[str, Any]:
    shards: list[dict[str, Any]] = []
    origins: list[float] = []
    for spec, result in zip(specs, results, strict=True):
        summary = result.summary or {}
        # The load's start: from the shard's summary, or (a worker that died) its records.
        origin, count = _load_origin_wall(records[spec.index])
        if summary.get("origin_wall") is not None:
            origin = float(summary["origin_wall"])
        late_ms = round((origin - spec.phase_s - start_at) * 1000, 3) if origin is not None else None
        if origin is not None:
            origins.append(origin - spec.phase_s)
        generator = summary.get("generator") or {}
        load = spec.settings
        shards.append(
            {
                "name": spec.name,
                "host": result.host,
                "pid": result.pid,
                "finished": result.finished,
                "error": result.error,
                "concurrency": load.concurrency,
                "rate_per_s": load.rate_per_s,
                "seed": load.seed,
                "start_late_ms": late_ms,
                "sent": summary.get("sent"),
                "measured": (summary.get("requests") or {}).get("measured"),
                "ok": (summary.get("requests") or {}).get("ok"),
                "requests_per_s": (summary.get("throughput") or {}).get("requests_per_s"),
                "generator_limited": generator.get("limited"),
                "generator_note": (generator.get("health") or {}).get("note"),
                "loop_lag_p99_ms": generator.get("loop_lag_p99_ms"),
                "cpu_share": generator.get("cpu_share"),
                "folder": result.folder,
                "records": str(records[spec.index]) if records[spec.index] is not None else None,
                "records_kept": count,
            }
        )
    skew = round((max(origins) - min(origins)) * 1000, 3) if len(origins) == len(specs) else None
    if skew is not None and skew > START_SKEW_TOLERANCE_MS:
        problems = [
            *problems,
            f"the workers' load began {skew:.1f} ms apart (tolerance {START_SKEW_TOLERANCE_MS:g} ms)",
        ]
    return {
        "count": len(specs),
        "mode": "dask" if cluster is not None else "processes",
        "cluster": cluster,
        "coordinator_host": socket.gethostname(),
        "start_at_wall": round(start_at, 6),
        "start_skew_ms": skew,
        "start_skew_tolerance_ms": START_SKEW_TOLERANCE_MS,
        "complete": all(result.finished for result in results),
        "problems": problems,
        "shards": shards,
    }


def _inside(root: Path, path: str | None) -> str | None:
    """``path`` relative to the run folder when it lies inside it (the folder can move)."""
    if path is None:
        return None
    try:
        return str(Path(path).relative_to(root))
    except ValueError:
        return path


def worker_records(folder: Path) -> list[dict[str, Any]]:
    """Every record of a run folder's workers, each with a ``worker`` field (its shard's
    name); empty for a folder that was not split. Times stay relative to each worker's own
    origin, which the agreed start aligns within the reported skew."""
    summary_path = folder / SUMMARY_FILE
    if not summary_path.is_file():
        return []
    workers = RunFolder(folder).read_json(SUMMARY_FILE).get("workers") or {}
    rows: list[dict[str, Any]] = []
    for shard in workers.get("shards", []):
        if not shard.get("records"):
            continue
        path = folder / shard["records"]  # relative, or absolute (then the join keeps it)
        if path.is_file():
            rows.extend({**row, "worker": shard["name"]} for row in read_records(path))
    return rows
