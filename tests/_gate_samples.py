"""Synthetic runs for the history, gate and alert tests: real encoded histograms, invented numbers.

The scenario: the nightly smoke benchmark of an (invented) ferry operator's help-desk chat,
target "larkspit-desk". Latencies are drawn from log-normal distributions so that runs
differ as real runs do; ``scale`` slows every latency by that factor.
"""

from __future__ import annotations

import random
from pathlib import Path
from typing import Any

from loadrun.metrics import HistogramSet
from loadrun.store import CONFIG_FILE, SUMMARY_FILE, RunFolder

TARGET = "larkspit-desk"
PROFILE = "nightly-desk-chat"
OUTPUT_TOKENS = 48


def synthetic_run(
    seed: int,
    *,
    scale: float = 1.0,
    requests: int = 300,
    failed: int = 0,
    limited: bool = False,
    concurrency: int = 8,
    profile_name: str = PROFILE,
    target_name: str = TARGET,
    base_url: str = "http://127.0.0.1:9/v1",
    started_at: str = "2026-03-01T03:00:00+0000",
) -> tuple[dict[str, Any], dict[str, Any]]:
    """(summary, config) shaped like the runner's, with ``requests`` successful requests."""
    rng = random.Random(seed)
    histograms = HistogramSet()
    for _ in range(requests):
        ttft_us = int(rng.lognormvariate(11.7, 0.25) * scale)  # about 120 ms
        gaps = [int(rng.lognormvariate(9.9, 0.15) * scale) for _ in range(OUTPUT_TOKENS - 1)]  # ~20 ms
        histograms.record_us("ttft", ttft_us)
        for gap in gaps:
            histograms.record_us("itl", gap)
        histograms.record_us("tpot", sum(gaps) // len(gaps))
        histograms.record_us("e2e", ttft_us + sum(gaps))
    config: dict[str, Any] = {
        "loadrun_version": "0.1.0",
        "started_at": started_at,
        "target": {
            "name": target_name,
            "base_url": base_url,
            "model": "desk-model",
            "api_key_env": None,
            "embedded_mock": False,
        },
        "embedded_mock": None,
        "profile": {
            "name": profile_name,
            "seed": 3,
            "source": f"/srv/bench/{profile_name}.toml",
            "request": {"input_tokens": 96, "output_tokens": OUTPUT_TOKENS, "stream": True},
            "load": {"concurrency": concurrency, "duration_s": None, "requests": requests, "warmup_s": 1.0},
        },
        "load": {
            "mode": "closed_loop",
            "concurrency": concurrency,
            "duration_s": None,
            "requests": requests,
            "warmup_s": 1.0,
            "time_limit_s": 3600.0,
        },
        "transport": "fast",
        "slos": [],
        "timeouts": {"connect_s": 10.0, "total_s": 600.0},
    }
    measured = requests + failed
    summary: dict[str, Any] = {
        **config,
        "run_folder": None,
        "interrupted": False,
        "aborted": None,
        "sent": measured,
        "window": {"start_s": 1.0, "end_s": 31.0, "seconds": 30.0},
        "requests": {
            "measured": measured,
            "ok": requests,
            "failed": failed,
            "by_outcome": {"ok": requests, **({"http_error": failed} if failed else {})},
            "warmup": 8,
            "completed_in_window": measured,
            "top_errors": {},
        },
        "throughput": {"requests_per_s": requests / 30.0, "output_tokens_per_s": requests * 48 / 30.0},
        "latency": histograms.summary(),
        "generator": {"limited": limited, "loop_lag_p99_ms": 9.0 if limited else 0.4},
        "histograms": histograms.encode(),
    }
    return summary, config


def write_run_folder(root: Path, summary: dict[str, Any], config: dict[str, Any]) -> Path:
    """A finished run folder as the runner leaves it (records omitted: the gate does not read them)."""
    folder = RunFolder.create(root, str(config["profile"]["name"]))
    folder.write_json(CONFIG_FILE, config)
    folder.write_json(SUMMARY_FILE, {**summary, "run_folder": str(folder.path)})
    return folder.path
