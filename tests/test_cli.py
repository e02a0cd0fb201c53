"""The command line as a user meets it: real processes, real loopback sockets."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest


def loadrun(
    *args: str, cwd: Path, env: dict[str, str] | None = None, timeout: float = 90
) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "loadrun", *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=timeout,
        stdin=subprocess.DEVNULL,
        env=env,
    )


def assert_one_line_error(result: subprocess.CompletedProcess[str], code: int, kind: str) -> None:
    assert result.returncode == code, result.stderr
    assert "Traceback" not in result.stderr
    lines = [line for line in result.stderr.splitlines() if line.strip()]
    assert lines and lines[-1].startswith(f"{kind}:"), result.stderr


@pytest.mark.slow
def test_measure_json_against_the_embedded_mock(tmp_path: Path) -> None:
    result = loadrun(
        "measure", "--json", "-n", "12", "-c", "2", "--warmup", "0.2", "--out", "out", cwd=tmp_path
    )
    assert result.returncode == 0, result.stderr
    assert "bundled mock server" in result.stderr
    summary = json.loads(result.stdout)
    assert summary["target"]["embedded_mock"] is True
    assert summary["requests"]["measured"] == 12 and summary["requests"]["failed"] == 0
    for metric in ("ttft", "itl", "tpot", "e2e"):
        assert summary["latency"][metric]["p50_ms"] > 0
        assert summary["latency"][metric]["p99_ms"] >= summary["latency"][metric]["p50_ms"]
    folder = Path(summary["run_folder"])
    folder = folder if folder.is_absolute() else tmp_path / folder
    assert {p.name for p in folder.iterdir()} == {"config.json", "records.jsonl", "summary.json"}
    assert json.loads((folder / "summary.json").read_text())["requests"]["measured"] == 12


@pytest.mark.slow
def test_measure_prints_a_readable_summary(tmp_path: Path) -> None:
    result = loadrun(
        "measure", "-n", "6", "-c", "2", "--warmup", "0", "--no-save", "--slo", "ttft=2000", cwd=tmp_path
    )
    assert result.returncode == 0, result.stderr
    for words in ("time to first token", "inter-token latency", "throughput", "goodput", "generator"):
        assert words in result.stdout
    assert not list(tmp_path.iterdir())  # --no-save writes nothing


def test_unreachable_endpoint_is_one_line_and_non_zero(tmp_path: Path) -> None:
    # Port 1 on loopback: nothing listens there, so the connection is refused at once.
    result = loadrun(
        "measure", "--base-url", "http://127.0.0.1:1/v1", "--model", "m", "-n", "3", cwd=tmp_path
    )
    assert_one_line_error(result, 1, "TargetUnreachable")


def test_malformed_profile_names_file_and_key(tmp_path: Path) -> None:
    (tmp_path / "bad.toml").write_text("[request]\ninput_tokens = 10\noutput_tokns = 5\n")
    result = loadrun("measure", "bad.toml", cwd=tmp_path)
    assert_one_line_error(result, 2, "ProfileError")
    assert "bad.toml" in result.stderr and "request.output_tokns" in result.stderr


def test_profile_that_is_not_toml(tmp_path: Path) -> None:
    (tmp_path / "bad.toml").write_text("this is = = not toml")
    assert_one_line_error(loadrun("measure", "bad.toml", cwd=tmp_path), 2, "ProfileError")


@pytest.mark.parametrize(
    "args",
    [
        ("-c", "0"),
        ("--slo", "latency=5"),
        ("--slo", "ttft=fast"),
        ("--requests", "5", "--duration", "5"),
        ("--model", "m"),
        ("--base-url", "ftp://127.0.0.1/v1", "--model", "m"),
        ("--base-url", "http://127.0.0.1:9/v1", "--model", "m", "--api-key-env", "LOADRUN_SURELY_UNSET_VAR"),
        ("--transport", "carrier-pigeon"),
    ],
)
def test_bad_options_exit_2_with_one_line(tmp_path: Path, args: tuple[str, ...]) -> None:
    assert_one_line_error(loadrun("measure", *args, cwd=tmp_path), 2, "UsageError")


def test_remote_target_needs_confirmation_and_nothing_is_sent(tmp_path: Path) -> None:
    # 192.0.2.0/24 is reserved for documentation (RFC 5737): it is refused before any send.
    result = loadrun("measure", "--base-url", "http://192.0.2.10/v1", "--model", "m", "-n", "5", cwd=tmp_path)
    assert_one_line_error(result, 2, "UsageError")
    assert "permission" in result.stderr and "--yes" in result.stderr


def test_key_over_plain_http_to_a_remote_host_is_refused(tmp_path: Path) -> None:
    env = {**__import__("os").environ, "LOADRUN_TEST_KEY": "sk-sentinel"}
    result = loadrun(
        "measure",
        "--base-url",
        "http://192.0.2.10/v1",
        "--model",
        "m",
        "--api-key-env",
        "LOADRUN_TEST_KEY",
        "--yes",
        cwd=tmp_path,
        env=env,
    )
    assert_one_line_error(result, 2, "UsageError")
    assert "sk-sentinel" not in result.stderr + result.stdout
