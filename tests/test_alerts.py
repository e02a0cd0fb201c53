"""The gate's outputs: JUnit XML, Prometheus text, the webhook (to a local server on 127.0.0.1)."""

from __future__ import annotations

import dataclasses
import json
import os
import socket
import stat
import subprocess
import sys
import threading
import xml.etree.ElementTree as ET
from collections.abc import Iterator
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import pytest
from _gate_samples import synthetic_run, write_run_folder
from prometheus_client.parser import text_string_to_metric_families

from loadrun.alerts import (
    GateOutputs,
    deliver,
    junit_xml,
    post_webhook,
    prometheus_text,
    webhook_url,
    write_atomically,
)
from loadrun.errors import UsageError
from loadrun.gate import GateReport, GateSettings, Verdict, gate_summary


# a webhook receiver on loopback ---------------------------------------------------------------
class Receiver:
    """Answers POSTs with the queued statuses (then 204) and keeps every body it got."""

    def __init__(self) -> None:
        self.bodies: list[Any] = []
        self.headers: list[dict[str, str]] = []
        self.statuses: list[int] = []
        receiver = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                length = int(self.headers.get("Content-Length", "0"))
                receiver.bodies.append(json.loads(self.rfile.read(length)))
                receiver.headers.append(dict(self.headers))
                status = receiver.statuses.pop(0) if receiver.statuses else 204
                self.send_response(status)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, format: str, *args: Any) -> None:
                pass

        self.server = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.server.server_address[1]}/hooks/s3cret-path"
        self.thread = threading.Thread(target=self.server.serve_forever, daemon=True)

    def __enter__(self) -> Receiver:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.server.shutdown()
        self.server.server_close()
        self.thread.join(timeout=10)


@pytest.fixture
def receiver() -> Iterator[Receiver]:
    with Receiver() as server:
        yield server


@pytest.fixture
def dead_url() -> str:
    """A loopback port that was just free and is now closed: connections are refused."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port = sock.getsockname()[1]
    return f"http://127.0.0.1:{port}/hook"


# reports of every verdict -----------------------------------------------------------------------
@pytest.fixture(scope="module")
def reports(tmp_path_factory: pytest.TempPathFactory) -> dict[Verdict, GateReport]:
    settings = GateSettings(history_path=tmp_path_factory.mktemp("h") / "history.sqlite3")
    found = {Verdict.NO_BASELINE: gate_summary(*synthetic_run(1), settings)}
    found[Verdict.PASS] = gate_summary(*synthetic_run(2), settings)
    found[Verdict.REGRESSION] = gate_summary(*synthetic_run(3, scale=1.3), settings)
    found[Verdict.INVALID] = gate_summary(*synthetic_run(4, failed=200), settings)
    assert {verdict: report.verdict for verdict, report in found.items()} == {v: v for v in found}
    return found


# JUnit XML -----------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("verdict", "failures", "errors", "skipped"),
    [
        (Verdict.PASS, 0, 0, 0),
        (Verdict.REGRESSION, 3, 0, 0),
        (Verdict.INVALID, 0, 1, 3),
        (Verdict.NO_BASELINE, 0, 0, 3),
    ],
)
def test_junit_counts_match_the_verdict(
    reports: dict[Verdict, GateReport], verdict: Verdict, failures: int, errors: int, skipped: int
) -> None:
    """The JUnit/Ant layout CI systems read (common practice, no single specification):
    testsuites > testsuite > testcase, with failure / error / skipped children."""
    root = ET.fromstring(junit_xml(reports[verdict]))
    assert root.tag == "testsuites"
    suite = root.find("testsuite")
    assert suite is not None
    cases = suite.findall("testcase")
    assert len(cases) == 4 == int(suite.get("tests", "0"))
    found = {
        kind: sum(1 for case in cases if case.find(kind) is not None)
        for kind in ("failure", "error", "skipped")
    }
    assert found == {"failure": failures, "error": errors, "skipped": skipped}
    assert (suite.get("failures"), suite.get("errors"), suite.get("skipped")) == tuple(
        str(n) for n in (failures, errors, skipped)
    )
    properties = {p.get("name"): p.get("value") for p in suite.iter("property")}
    assert properties["verdict"] == verdict.value
    assert properties["exit_code"] == str(verdict.exit_code)
    assert all(case.get("classname", "").startswith("loadrun.gate.larkspit-desk") for case in cases)


def test_junit_failure_says_how_much_slower(reports: dict[Verdict, GateReport]) -> None:
    root = ET.fromstring(junit_xml(reports[Verdict.REGRESSION]))
    failure = root.find(".//testcase[@name='ttft.p95 15%']/failure")
    assert failure is not None and failure.get("type") == "regression"
    assert "x1.3" in (failure.get("message") or "") and "interval" in (failure.text or "")


# Prometheus text -----------------------------------------------------------------------------
def metrics(text: str) -> dict[str, list[tuple[dict[str, str], float]]]:
    """Parsed by the Prometheus project's own Python parser (prometheus_client.parser)."""
    return {
        family.name: [(sample.labels, sample.value) for sample in family.samples]
        for family in text_string_to_metric_families(text)
    }


def test_prometheus_text_is_read_by_prometheus_parser(reports: dict[Verdict, GateReport]) -> None:
    parsed = metrics(prometheus_text(reports[Verdict.REGRESSION], now=lambda: 1_770_000_000.0))
    verdicts = {labels["verdict"]: value for labels, value in parsed["loadrun_gate_verdict"]}
    assert verdicts == {"pass": 0.0, "regression": 1.0, "invalid": 0.0, "no_baseline": 0.0}
    assert parsed["loadrun_gate_exit_code"][0][1] == 1.0
    assert parsed["loadrun_gate_timestamp_seconds"][0][1] == 1_770_000_000.0
    latency = {labels["metric"]: value for labels, value in parsed["loadrun_gate_latency_seconds"]}
    report_rules = {rule.rule.target.metric: rule for rule in reports[Verdict.REGRESSION].rules}
    for metric, value in latency.items():
        change = report_rules[metric].change
        assert change is not None and value == pytest.approx(change.current_us / 1e6)
    assert all(value == 1.0 for _, value in parsed["loadrun_gate_rule_regressed"])
    labels = parsed["loadrun_gate_ratio"][0][0]
    assert labels["target"] == "larkspit-desk" and labels["percentile"] == "95"


def test_prometheus_invalid_run_has_no_ratios(reports: dict[Verdict, GateReport]) -> None:
    parsed = metrics(prometheus_text(reports[Verdict.INVALID]))
    assert parsed["loadrun_gate_exit_code"][0][1] == 2.0
    assert parsed["loadrun_gate_error_ratio"][0][1] == pytest.approx(200 / 500)
    assert "loadrun_gate_ratio" not in parsed


def test_prometheus_label_values_are_escaped(reports: dict[Verdict, GateReport]) -> None:
    """Backslash, double quote and line feed are escaped in label values (Prometheus text
    exposition format, "Text format details")."""
    report = reports[Verdict.PASS]
    odd = dataclasses.replace(report, target_name='a "b"\\c\nd')
    parsed = metrics(prometheus_text(odd))
    assert parsed["loadrun_gate_exit_code"][0][0]["target"] == 'a "b"\\c\nd'


def test_files_are_replaced_atomically(tmp_path: Path) -> None:
    target = tmp_path / "loadrun.prom"
    target.write_text("old\n")
    write_atomically(target, "new\n")
    assert target.read_text() == "new\n"
    assert [p.name for p in tmp_path.iterdir()] == ["loadrun.prom"]  # no temporary left behind
    assert stat.S_IMODE(target.stat().st_mode) == 0o644  # readable by the collector's user


# checks before the run -------------------------------------------------------------------------
@pytest.mark.parametrize(
    "outputs",
    [
        GateOutputs(junit_path=Path("/nonexistent-folder/x.xml")),
        GateOutputs(prometheus_path=Path("/")),
        GateOutputs(webhook_url="ftp://127.0.0.1/x"),
        GateOutputs(webhook_url="A://["),  # found by the command-line fuzz test: urlsplit raised
        GateOutputs(webhook_url="http://127.0.0.1:99999/x"),
        GateOutputs(webhook_url="http://127.0.0.1/x", webhook_retries=-1),
    ],
)
def test_outputs_that_cannot_work_fail_before_the_run(outputs: GateOutputs) -> None:
    with pytest.raises(UsageError):
        outputs.check()


def test_webhook_url_from_the_environment(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("LOADRUN_TEST_HOOK", "http://127.0.0.1:9/hook")
    assert webhook_url(None, "LOADRUN_TEST_HOOK") == "http://127.0.0.1:9/hook"
    assert webhook_url("http://127.0.0.1:9/x", None) == "http://127.0.0.1:9/x"
    with pytest.raises(UsageError):
        webhook_url(None, "LOADRUN_SURELY_UNSET_HOOK")
    with pytest.raises(UsageError):
        webhook_url("http://127.0.0.1:9/x", "LOADRUN_TEST_HOOK")


# webhook ---------------------------------------------------------------------------------------
def test_the_payload_arrives(receiver: Receiver, reports: dict[Verdict, GateReport]) -> None:
    payload = reports[Verdict.REGRESSION].to_json()
    result = post_webhook(receiver.url, payload, timeout_s=5)
    assert result.delivered and result.attempts == 1 and result.status == 204
    assert receiver.bodies == [json.loads(json.dumps(payload))]
    assert receiver.headers[0]["Content-Type"] == "application/json"
    assert "s3cret" not in result.where


def test_server_errors_are_retried_and_refusals_are_not(receiver: Receiver) -> None:
    waits: list[float] = []
    receiver.statuses = [503, 500]
    result = post_webhook(receiver.url, {"n": 1}, retries=2, backoff_s=0.5, sleep=waits.append)
    assert result.delivered and result.attempts == 3 and waits == [0.5, 1.0]
    receiver.statuses = [400]
    result = post_webhook(receiver.url, {"n": 2}, retries=2, sleep=waits.append)
    assert not result.delivered and result.attempts == 1 and result.error == "HTTP 400"


def test_a_dead_webhook_is_a_warning(dead_url: str, reports: dict[Verdict, GateReport]) -> None:
    waits: list[float] = []
    result = post_webhook(dead_url, {"n": 1}, timeout_s=2, retries=2, backoff_s=0.01, sleep=waits.append)
    assert not result.delivered and result.attempts == 3 and result.status is None
    assert "ConnectError" in (result.error or "")
    warnings = deliver(reports[Verdict.PASS], GateOutputs(webhook_url=dead_url, webhook_backoff_s=0.01))
    assert len(warnings) == 1 and "not reached after 3 attempts" in warnings[0]


# the command line --------------------------------------------------------------------------------
def loadrun(*args: str, cwd: Path, env: dict[str, str] | None = None) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "loadrun", *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=90,
        stdin=subprocess.DEVNULL,
        env=env,
    )


@pytest.fixture
def regressed_folder(tmp_path: Path) -> Path:
    """A history with two good nights, and the run folder of a slow one to gate."""
    settings = GateSettings(history_path=tmp_path / "history.sqlite3")
    for seed in (1, 2):
        gate_summary(*synthetic_run(seed), settings)
    return write_run_folder(tmp_path / "runs", *synthetic_run(3, scale=1.3))


def test_cli_sends_every_output_and_exits_with_the_verdict(
    tmp_path: Path, regressed_folder: Path, receiver: Receiver
) -> None:
    env = {**os.environ, "LOADRUN_TEST_HOOK": receiver.url}
    result = loadrun(
        "gate", "--from-run", str(regressed_folder), "--history", "history.sqlite3",
        "--junit", "gate.xml", "--prometheus", "gate.prom", "--webhook-env", "LOADRUN_TEST_HOOK", "--json",
        cwd=tmp_path, env=env,
    )  # fmt: skip
    assert result.returncode == 1, result.stderr
    report = json.loads(result.stdout)
    assert report["verdict"] == "regression" and sorted(report["baseline"]["run_ids"]) == [1, 2]
    assert receiver.bodies == [report]
    assert ET.parse(tmp_path / "gate.xml").getroot().find("testsuite").get("failures") == "3"  # type: ignore[union-attr]
    assert metrics((tmp_path / "gate.prom").read_text())["loadrun_gate_exit_code"][0][1] == 1.0
    assert "Warning" not in result.stderr


@pytest.mark.parametrize("expected", [0, 1])
def test_cli_dead_webhook_leaves_the_exit_code(
    tmp_path: Path, regressed_folder: Path, dead_url: str, expected: int
) -> None:
    folder = regressed_folder
    if expected == 0:
        folder = write_run_folder(tmp_path / "runs", *synthetic_run(4))
    result = loadrun(
        "gate", "--from-run", str(folder), "--history", "history.sqlite3", "--webhook", dead_url,
        "--webhook-retries", "1", "--webhook-timeout", "2", "--junit", "gate.xml",
        cwd=tmp_path,
    )  # fmt: skip
    assert result.returncode == expected, result.stderr
    assert "Warning: the webhook at http://127.0.0.1" in result.stderr
    assert "not reached after 2 attempts" in result.stderr
    assert "Traceback" not in result.stderr
    assert (tmp_path / "gate.xml").is_file()
    assert ("REGRESSION" if expected else "PASS") in result.stdout


def test_cli_refuses_an_output_folder_that_does_not_exist(tmp_path: Path, regressed_folder: Path) -> None:
    result = loadrun(
        "gate", "--from-run", str(regressed_folder), "--history", "h.sqlite3", "--junit", "no/such/gate.xml",
        cwd=tmp_path,
    )  # fmt: skip
    assert result.returncode == 2 and result.stderr.strip().splitlines()[-1].startswith("UsageError:")
    assert not (tmp_path / "h.sqlite3").exists()  # nothing ran


def test_cli_run_stopped_by_a_signal_writes_its_outputs_and_exits_130(tmp_path: Path) -> None:
    """130 for a stopped run, as `loadrun measure` exits (128 + SIGINT, the shell convention)."""
    summary, config = synthetic_run(5)
    summary["interrupted"] = True
    summary["interrupt"] = {"signal": "SIGTERM", "grace_s": 5.0}
    folder = write_run_folder(tmp_path / "runs", summary, config)
    result = loadrun(
        "gate", "--from-run", str(folder), "--history", "h.sqlite3", "--junit", "g.xml", cwd=tmp_path
    )
    assert result.returncode == 130, result.stderr
    assert "INVALID" in result.stdout and "Interrupted by SIGTERM" in result.stderr
    assert ET.parse(tmp_path / "g.xml").getroot().find("testsuite").get("errors") == "1"  # type: ignore[union-attr]
