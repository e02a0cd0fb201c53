"""Every shipped profile runs against the bundled mock: closed loop, open loop and replay."""

from __future__ import annotations

import json
import subprocess
import sys
from collections.abc import Iterator
from dataclasses import replace
from pathlib import Path

import pytest

from loadrun.cli import main
from loadrun.distributions import Distribution
from loadrun.profile import Profile, load_profile
from loadrun.runner import MeasureSettings, embedded_mock, measure
from loadrun.target import Target

pytestmark = pytest.mark.slow

ROOT = Path(__file__).resolve().parent.parent
PROFILES = sorted((ROOT / "profiles").glob("*.toml"))


@pytest.fixture(scope="module")
def mock_target() -> Iterator[Target]:
    with embedded_mock("small-fast") as (target, _info):
        yield target


def test_at_least_six_profiles_ship() -> None:
    names = {path.stem for path in PROFILES}
    assert len(names) >= 6
    assert {
        "harbour-desk-chat",
        "tide-desk-lookup",
        "notice-digest",
        "ticket-triage",
        "quay-script-helper",
        "berth-request-extract",
    } <= names


def trace_for(path: Path, profile_path: Path) -> Path:
    """A four-arrival trace naming the profile's classes in turn."""
    classes = [spec.name for spec in load_profile(profile_path).mix()]
    rows = [
        {
            "offset_s": 0.1 * index,
            "input_tokens": 60 + 10 * index,
            "output_tokens": 4,
            "class": classes[index % len(classes)],
        }
        for index in range(4)
    ]
    path.write_text("".join(json.dumps(row) + "\n" for row in rows))
    return path


def brisk(profile: Profile) -> Profile:
    """The same profile with short answers and short session think times (a short test)."""
    specs = [
        replace(spec, session=replace(spec.session, think_time=Distribution.fixed(0.02)))
        if spec.session is not None
        else spec
        for spec in profile.with_lengths(None, 4).mix()
    ]
    if profile.classes:
        return replace(profile, classes=tuple(specs))
    return replace(profile, request=specs[0])


@pytest.mark.parametrize("profile_path", PROFILES, ids=lambda path: path.stem)
@pytest.mark.parametrize("mode", ["closed", "open", "replay"])
def test_shipped_profile_runs(mock_target: Target, profile_path: Path, mode: str, tmp_path: Path) -> None:
    profile = load_profile(profile_path)
    settings = MeasureSettings(
        profile=brisk(profile),
        target=mock_target,
        warmup_s=0.0,
        out_dir=tmp_path,
        record_history=False,
    )
    if mode == "closed":
        settings = replace(settings, concurrency=2, requests=4)
    elif mode == "open":
        settings = replace(settings, rate_per_s=20.0, requests=4)
    else:
        settings = replace(
            settings, arrival="replay", trace_path=trace_for(tmp_path / "t.jsonl", profile_path)
        )
    result = measure(settings)
    summary = result.summary
    assert summary["requests"]["failed"] == 0, summary["requests"]
    assert summary["requests"]["measured"] >= 4
    assert summary["load"]["mode"] == ("closed_loop" if mode == "closed" else "open_loop")
    assert set(summary["classes"]) <= {spec.name for spec in profile.mix()}
    lengths = summary["input_lengths"]
    if lengths["samples"]:
        assert abs(lengths["mean_relative_error"]) < 0.05, lengths
    checked = any(spec.check is not None for spec in profile.mix())
    assert (summary["compliance"]["checked"] > 0) is checked
    assert result.folder is not None and (result.folder / "records.jsonl").is_file()


def loadrun_cli(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "loadrun", "measure", *args, "--warmup", "0", "--json", "--no-save"],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=120,
        stdin=subprocess.DEVNULL,
    )


@pytest.mark.parametrize(
    ("args", "mode"),
    [
        (("profiles/quay-script-helper.toml", "-c", "2", "-n", "4", "--output-tokens", "8"), "closed_loop"),
        (("profiles/tide-desk-lookup.toml", "--rate", "10", "-n", "5", "--output-tokens", "8"), "open_loop"),
        (
            (
                "profiles/harbour-desk-chat.toml",
                "--arrival",
                "replay",
                "--trace",
                "profiles/traces/harbour-desk-morning.jsonl",
                "--replay-speed",
                "8",
                "--output-tokens",
                "8",
            ),
            "open_loop",
        ),
    ],
)
def test_measure_command_takes_the_arrival_and_load_level(args: tuple[str, ...], mode: str) -> None:
    result = loadrun_cli(*args, cwd=ROOT)
    assert result.returncode == 0, result.stderr
    summary = json.loads(result.stdout)
    assert summary["load"]["mode"] == mode
    assert summary["requests"]["failed"] == 0
    if mode == "open_loop":
        assert summary["arrivals"]["due"] == summary["requests"]["measured"] + summary["requests"]["warmup"]
        assert summary["arrivals"]["not_sent"] == 0


@pytest.mark.parametrize(
    ("args", "words"),
    [
        (("-c", "2", "--rate", "3"), "not both"),
        (("--arrival", "poisson"), "positive rate"),
        (("--arrival", "replay"), "trace"),
        (("--arrival", "sometimes"), "unknown arrival"),
        (("--rate", "0"), "positive rate"),
        (("--arrival", "closed", "--rate", "2"), "open-loop"),
        (("--trace", "no-such-trace.jsonl", "--arrival", "replay"), "no such trace"),
    ],
)
def test_bad_arrival_options_are_one_line_errors(
    tmp_path: Path,
    args: tuple[str, ...],
    words: str,
    capsys: pytest.CaptureFixture[str],
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    monkeypatch.chdir(tmp_path)
    with pytest.raises(SystemExit) as exit_info:
        main(["measure", *args, "--no-save"])
    assert exit_info.value.code == 2
    stderr = capsys.readouterr().err
    assert "Traceback" not in stderr
    last = [line for line in stderr.splitlines() if line.strip()][-1]
    assert last.startswith("UsageError:") and words in last, stderr
