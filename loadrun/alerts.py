"""Where a gate's verdict goes besides the terminal: JUnit XML, a Prometheus text file, a webhook.

None of these changes the verdict or the exit code: a file that cannot be written or a
webhook that does not answer becomes a warning, and the run's exit code stays as it was.
Paths are checked before the run, so a mistyped folder fails at once (exit 2), not after
minutes of load.
"""

from __future__ import annotations

import contextlib
import math
import os
import tempfile
import time
import xml.etree.ElementTree as ET
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import httpx

from loadrun.errors import UsageError
from loadrun.gate import GateReport, Verdict

__all__ = [
    "GateOutputs",
    "WebhookResult",
    "deliver",
    "junit_xml",
    "post_webhook",
    "prometheus_text",
    "webhook_url",
    "write_atomically",
]


@dataclass(frozen=True, slots=True)
class GateOutputs:
    junit_path: Path | None = None
    prometheus_path: Path | None = None
    webhook_url: str | None = None
    webhook_timeout_s: float = 10.0
    webhook_retries: int = 2
    """Further attempts after a failed first one."""
    webhook_backoff_s: float = 1.0
    """Wait before the first retry; doubled before each further one."""

    def check(self) -> None:
        """Fail now, before any load, when a path or URL cannot possibly work."""
        for option, path in (("--junit", self.junit_path), ("--prometheus", self.prometheus_path)):
            if path is None:
                continue
            folder = path.parent if str(path.parent) else Path(".")
            if not folder.is_dir():
                raise UsageError(f"{option} {path}: the folder {folder} does not exist")
            if path.is_dir():
                raise UsageError(f"{option} {path}: is a folder, not a file")
        if self.webhook_url is not None:
            try:  # a bracket left open or a port out of range raises ValueError
                parts = urlsplit(self.webhook_url)
                valid = parts.scheme in ("http", "https") and bool(parts.hostname) and parts.port != 0
            except ValueError:
                valid = False
            if not valid:
                raise UsageError("the webhook must be an http or https URL")
        if self.webhook_timeout_s <= 0 or self.webhook_retries < 0 or self.webhook_backoff_s < 0:
            raise UsageError("webhook timeout must be positive, retries and backoff not negative")


def webhook_url(url: str | None, env_name: str | None) -> str | None:
    """The webhook URL, given directly or read from the named environment variable."""
    if url is not None and env_name is not None:
        raise UsageError("give --webhook or --webhook-env, not both")
    if env_name is None:
        return url
    value = os.environ.get(env_name, "").strip()
    if not value:
        raise UsageError(f"environment variable {env_name} (named by --webhook-env) is not set")
    return value


def deliver(report: GateReport, outputs: GateOutputs) -> list[str]:
    """Write every requested output; returns the warnings (empty when all went through)."""
    warnings = []
    payload = report.to_json()
    for path, render, kind in (
        (outputs.junit_path, junit_xml, "JUnit XML"),
        (outputs.prometheus_path, prometheus_text, "Prometheus text"),
    ):
        if path is None:
            continue
        try:
            write_atomically(path, render(report))
        except OSError as exc:
            warnings.append(f"could not write the {kind} file {path}: {exc.strerror or exc}")
    if outputs.webhook_url is not None:
        result = post_webhook(
            outputs.webhook_url,
            payload,
            timeout_s=outputs.webhook_timeout_s,
            retries=outputs.webhook_retries,
            backoff_s=outputs.webhook_backoff_s,
        )
        if not result.delivered:
            warnings.append(
                f"the webhook at {result.where} was not reached after {result.attempts} attempts: "
                f"{result.error}"
            )
    return warnings


def write_atomically(path: Path, text: str) -> None:
    """Write beside the target, then rename: a reader (a textfile collector) never sees half."""
    folder = path.parent if str(path.parent) else Path(".")
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=folder)
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as file:
            file.write(text)
            file.flush()
            os.fsync(file.fileno())
        os.chmod(temporary, 0o644)
        os.replace(temporary, path)
    except BaseException:
        with contextlib.suppress(OSError):
            os.unlink(temporary)
        raise


# JUnit XML ----------------------------------------------------------------------------------
def junit_xml(report: GateReport) -> str:
    """One test suite, one test case per rule (plus one for the run's validity).

    The layout CI systems read: testsuites > testsuite > testcase with failure, error or
    skipped children (the JUnit/Ant convention; common practice, no single specification).
    """
    data = report.to_json()
    suite_name = f"loadrun gate: {report.target_name} / {report.profile_name}"
    classname = f"loadrun.gate.{_dotted(report.target_name)}.{_dotted(report.profile_name)}"
    seconds = f"{float(report.measured.get('window_s') or 0.0):.3f}"
    cases: list[ET.Element] = []

    validity = ET.Element("testcase", classname=classname, name="run is valid", time=seconds)
    if report.verdict is Verdict.INVALID:
        error = ET.SubElement(validity, "error", type="invalid", message="; ".join(report.reasons))
        error.text = "\n".join(report.reasons)
    cases.append(validity)

    for rule in data["rules"]:
        case = ET.Element("testcase", classname=classname, name=str(rule["rule"]), time="0")
        if rule.get("regressed"):
            failure = ET.SubElement(case, "failure", type="regression", message=_rule_line(rule))
            failure.text = _rule_line(rule)
        elif "ratio" not in rule:
            ET.SubElement(case, "skipped", message=str(rule.get("note") or "not compared"))
        else:
            output = ET.SubElement(case, "system-out")
            output.text = _rule_line(rule)
        cases.append(case)

    counts = {
        "tests": str(len(cases)),
        "failures": str(sum(1 for case in cases if case.find("failure") is not None)),
        "errors": str(sum(1 for case in cases if case.find("error") is not None)),
        "skipped": str(sum(1 for case in cases if case.find("skipped") is not None)),
        "time": seconds,
    }
    root = ET.Element("testsuites", {"name": "loadrun gate", **counts})
    suite = ET.SubElement(root, "testsuite", {"name": suite_name, "timestamp": report.started_at, **counts})
    properties = ET.SubElement(suite, "properties")
    for name, value in (
        ("verdict", report.verdict.value),
        ("exit_code", str(report.exit_code)),
        ("target_url", report.target_url),
        ("profile_hash", report.profile_hash),
        ("baseline", report.baseline_kind or ""),
        ("run_id", "" if report.run_id is None else str(report.run_id)),
    ):
        ET.SubElement(properties, "property", name=name, value=value)
    suite.extend(cases)
    ET.indent(root)
    return '<?xml version="1.0" encoding="utf-8"?>\n' + ET.tostring(root, encoding="unicode") + "\n"


def _rule_line(rule: dict[str, Any]) -> str:
    if "ratio" not in rule:
        return f"{rule['rule']}: {rule.get('note') or 'not compared'}"
    low, high = rule["ratio_interval"]
    return (
        f"{rule['rule']}: {rule['current_ms']:.2f} ms against {rule['baseline_ms']:.2f} ms, "
        f"x{rule['ratio']:.3f} (interval x{low:.3f}..x{high:.3f}), {rule['rise_ms']:+.2f} ms"
    )


def _dotted(name: str) -> str:
    return "".join(c if c.isalnum() or c in "-_" else "_" for c in name) or "_"


# Prometheus text format -----------------------------------------------------------------------
def prometheus_text(report: GateReport, now: Callable[[], float] = time.time) -> str:
    """Gauges for a node exporter's textfile collector (Prometheus text exposition format 0.0.4).

    Seconds as the unit, as Prometheus recommends for time. Alert on
    ``loadrun_gate_verdict{verdict="regression"} == 1`` or on the exit code.
    """
    base = {"target": report.target_name, "profile": report.profile_name}
    out = _PromWriter()
    out.family("loadrun_gate_verdict", "1 for the verdict of the latest gate run, 0 for the others.")
    for verdict in Verdict:
        out.sample({**base, "verdict": verdict.value}, 1.0 if verdict is report.verdict else 0.0)
    out.family(
        "loadrun_gate_exit_code", "Exit code of the latest gate run (0 pass, 1 regression, 2 invalid)."
    )
    out.sample(base, float(report.exit_code))
    out.family("loadrun_gate_timestamp_seconds", "When the latest gate run finished, Unix time.")
    out.sample(base, now())
    measured = report.measured
    if measured.get("requests") is not None:
        out.family("loadrun_gate_requests", "Requests measured in the latest gate run.")
        out.sample(base, float(measured["requests"]))
        failed = float(measured.get("failed") or 0)
        out.family("loadrun_gate_error_ratio", "Share of the measured requests that failed.")
        out.sample(base, failed / float(measured["requests"]) if measured["requests"] else 0.0)
    rules = [rule for rule in report.to_json()["rules"] if "ratio" in rule]
    families = (
        ("loadrun_gate_latency_seconds", "The percentile in the latest gate run.", "current_ms", 1e-3),
        ("loadrun_gate_baseline_latency_seconds", "The percentile of the baseline.", "baseline_ms", 1e-3),
        ("loadrun_gate_ratio", "Latest run / baseline, point estimate.", "ratio", 1.0),
    )
    for name, help_text, key, scale in families:
        if rules:
            out.family(name, help_text)
        for rule in rules:
            out.sample(_rule_labels(base, rule), float(rule[key]) * scale)
    if rules:
        out.family("loadrun_gate_ratio_lower", "Lower end of the bootstrap interval of the ratio.")
        for rule in rules:
            out.sample(_rule_labels(base, rule), float(rule["ratio_interval"][0]))
        out.family("loadrun_gate_rule_regressed", "1 when the rule found a regression.")
        for rule in rules:
            out.sample(_rule_labels(base, rule), 1.0 if rule["regressed"] else 0.0)
    return out.text()


def _rule_labels(base: dict[str, str], rule: dict[str, Any]) -> dict[str, str]:
    return {**base, "metric": str(rule["metric"]), "percentile": f"{float(rule['percentile']):g}"}


class _PromWriter:
    def __init__(self) -> None:
        self.lines: list[str] = []
        self.name = ""

    def family(self, name: str, help_text: str) -> None:
        self.name = name
        self.lines.append(f"# HELP {name} {_escape_help(help_text)}")
        self.lines.append(f"# TYPE {name} gauge")

    def sample(self, labels: dict[str, str], value: float) -> None:
        inner = ",".join(f'{key}="{_escape_label(value)}"' for key, value in labels.items())
        self.lines.append(f"{self.name}{{{inner}}} {_number(value)}")

    def text(self) -> str:
        return "\n".join(self.lines) + "\n"


def _escape_help(text: str) -> str:
    return text.replace("\\", "\\\\").replace("\n", "\\n")


def _escape_label(text: str) -> str:
    return text.replace("\\", "\\\\").replace("\n", "\\n").replace('"', '\\"')


def _number(value: float) -> str:
    if math.isnan(value):
        return "NaN"
    if math.isinf(value):
        return "+Inf" if value > 0 else "-Inf"
    return repr(float(value))


# Webhook -----------------------------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class WebhookResult:
    delivered: bool
    attempts: int
    where: str
    """Scheme, host and port only: a webhook URL often carries a secret in its path."""
    status: int | None = None
    error: str | None = None


def post_webhook(
    url: str,
    payload: dict[str, Any],
    *,
    timeout_s: float = 10.0,
    retries: int = 2,
    backoff_s: float = 1.0,
    transport: httpx.BaseTransport | None = None,
    sleep: Callable[[float], None] = time.sleep,
) -> WebhookResult:
    """POST the payload as JSON; retry on connection errors, timeouts, 429 and 5xx. Never raises."""
    parts = urlsplit(url)
    where = f"{parts.scheme}://{parts.hostname}" + (f":{parts.port}" if parts.port else "")
    attempts = 0
    status: int | None = None
    error = "not attempted"
    delay = backoff_s
    try:
        client = httpx.Client(timeout=timeout_s, transport=transport, follow_redirects=False)
    except (ValueError, httpx.HTTPError) as exc:
        return WebhookResult(False, 0, where, None, str(exc))
    with client:
        while attempts <= retries:
            if attempts:
                sleep(delay)
                delay *= 2
            attempts += 1
            try:
                response = client.post(url, json=payload, headers={"User-Agent": "loadrun-gate"})
            except httpx.HTTPError as exc:
                status, error = None, f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
                continue
            status = response.status_code
            if response.is_success:
                return WebhookResult(True, attempts, where, status)
            error = f"HTTP {status}"
            if status != 429 and status < 500:
                break  # the receiver refuses this request; sending it again will not help
    return WebhookResult(False, attempts, where, status, error)
