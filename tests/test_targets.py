"""The targets file: loading, validation with clear errors, prices and the cost of a request."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

import pytest

from loadrun.errors import UsageError
from loadrun.targets import Prices, TargetSpec, load_targets, started_targets, targets_from_dict

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "targets" / "harbour-desk-candidates.toml"


def test_the_demo_file_loads_three_mock_targets_with_prices() -> None:
    demo = load_targets(DEMO)
    assert demo.names() == ["gullwing-cloud", "tidewater-open", "quay-box"]
    assert all(spec.is_mock and spec.is_loopback for spec in demo.targets)
    gullwing, tidewater, quay = demo.targets
    assert gullwing.model == "gullwing-chat-s"  # set in the file
    assert tidewater.model == "tidewater-open-13b"  # from its engine file
    assert quay.context_window == 4096  # from its engine file
    assert gullwing.prices.per_token and quay.prices.per_hour == 2.10
    engines = {spec.mock_engine for spec in demo.targets}
    assert len(engines) == 3  # three different engine configurations
    assert quay.transport.total_timeout_s == 60.0


def test_a_remote_target_keeps_only_the_name_of_its_key_variable() -> None:
    spec = targets_from_dict(
        {
            "targets": {
                "gullwing": {
                    "base_url": "https://api.gullwing.invalid/v1",
                    "model": "gw-chat",
                    "api_key_env": "GULLWING_KEY",
                    "headers": {"X-Team": "ferry-desk"},
                    "context_window": 16384,
                    "prices": {"input_per_million": 0.4, "output_per_million": 1.6},
                    "transport": {"name": "httpx", "connect_timeout_s": 3, "verify_tls": True},
                }
            }
        }
    ).targets[0]
    assert not spec.is_loopback
    target = spec.target()
    assert target.api_key_env == "GULLWING_KEY" and target.headers == (("X-Team", "ferry-desk"),)
    described = repr(spec.describe())
    assert "GULLWING_KEY" in described and "ferry-desk" not in described  # header values stay out
    assert spec.transport.name == "httpx" and spec.transport.connect_timeout_s == 3.0


@pytest.mark.parametrize(
    ("entry", "message"),
    [
        ({"model": "m"}, "give either base_url or mock_engine"),
        ({"base_url": "http://127.0.0.1:1/v1", "mock_engine": "small-fast", "model": "m"}, "not both"),
        ({"base_url": "http://127.0.0.1:1/v1"}, "targets.t.model: a target needs a model name"),
        ({"base_url": "ftp://x/v1", "model": "m"}, "targets.t.base_url"),
        (
            {"base_url": "http://127.0.0.1:1/v1", "model": "m", "colour": "red"},
            "targets.t.colour: unknown key",
        ),
        ({"mock_engine": "no-such-engine"}, "targets.t.mock_engine: unknown engine preset"),
        (
            {"base_url": "http://127.0.0.1:1/v1", "model": "m", "prices": {"input_per_million": "cheap"}},
            "targets.t.prices.input_per_million: must be a number",
        ),
        (
            {"base_url": "http://127.0.0.1:1/v1", "model": "m", "prices": {"per_hour": -1}},
            "targets.t.prices.per_hour: must be at least 0",
        ),
        (
            {
                "base_url": "http://127.0.0.1:1/v1",
                "model": "m",
                "prices": {"per_hour": 2, "input_per_million": 1},
            },
            "not both",
        ),
        (
            {"base_url": "http://127.0.0.1:1/v1", "model": "m", "headers": {"Authorization": "Bearer x"}},
            "keys go in api_key_env",
        ),
        ({"base_url": "http://127.0.0.1:1/v1", "model": "m", "api_key_env": "sk-abc123"}, "the NAME"),
        (
            {"base_url": "http://api.gullwing.invalid/v1", "model": "m", "api_key_env": "KEY"},
            "refusing to send an API key over plain http",
        ),
        ({"base_url": "http://127.0.0.1:1/v1", "model": "m", "context_window": 0}, "at least 1"),
        (
            {"base_url": "http://127.0.0.1:1/v1", "model": "m", "transport": {"name": "carrier-pigeon"}},
            "targets.t.transport.name: choose one of",
        ),
    ],
)
def test_bad_entries_name_the_file_and_the_key(entry: dict[str, object], message: str) -> None:
    with pytest.raises(UsageError) as caught:
        targets_from_dict({"targets": {"t": entry}}, source="ferries.toml")
    assert str(caught.value).startswith("ferries.toml: ")
    assert message in str(caught.value)


def test_file_level_errors(tmp_path: Path) -> None:
    with pytest.raises(UsageError, match="no such targets file"):
        load_targets(tmp_path / "missing.toml")
    broken = tmp_path / "broken.toml"
    broken.write_text("[targets.a\n", encoding="utf-8")
    with pytest.raises(UsageError, match="not valid TOML"):
        load_targets(broken)
    with pytest.raises(UsageError, match="name at least one target"):
        targets_from_dict({"targets": {}})
    with pytest.raises(UsageError, match="unknown key"):
        targets_from_dict({"target": {}})
    with pytest.raises(UsageError, match="a target name is"):
        targets_from_dict({"targets": {"bad name!": {"base_url": "http://127.0.0.1:1/v1", "model": "m"}}})


def test_engine_paths_are_relative_to_the_targets_file(tmp_path: Path) -> None:
    (tmp_path / "engines").mkdir()
    (tmp_path / "engines" / "slow.toml").write_text(
        'model = "slow-one"\nstep_base_ms = 12.0\n', encoding="utf-8"
    )
    file = tmp_path / "t.toml"
    file.write_text('[targets.slow]\nmock_engine = "engines/slow.toml"\n', encoding="utf-8")
    spec = load_targets(file).targets[0]
    assert spec.model == "slow-one"
    assert spec.mock_engine == str((tmp_path / "engines" / "slow.toml").resolve())


def test_cost_per_request_from_token_prices() -> None:
    """2,000 input tokens at $0.03 per 1,000 cost $0.06 (common practice, no source; SOURCES.md 6)."""
    per_thousand = 0.03
    prices = Prices(input_per_million=per_thousand * 1000, output_per_million=0.06 * 1000)
    assert prices.request_cost(2000, 0) == pytest.approx(0.06, abs=1e-12)
    # Output at $0.06 per 1,000: 500 tokens cost $0.03, so the request costs $0.09 in all.
    assert prices.request_cost(2000, 500) == pytest.approx(0.09, abs=1e-12)
    # Hand-computed: 1,000,000 input tokens at $0.40 per million and 250,000 output tokens at
    # $1.60 per million: 0.40 + 0.40 = $0.80.
    assert Prices(0.40, 1.60).request_cost(1_000_000, 250_000) == pytest.approx(0.80, abs=1e-12)


def test_cost_per_request_from_an_hourly_price() -> None:
    """Hand-computed: $3.60 an hour is $0.001 a second; at 2 requests/s, $0.0005 a request."""
    prices = Prices(per_hour=3.60)
    assert prices.hourly_request_cost(2.0) == pytest.approx(0.0005, abs=1e-15)
    with pytest.raises(ValueError):
        prices.hourly_request_cost(0.0)
    with pytest.raises(ValueError):
        prices.request_cost(10, 10)


@pytest.mark.slow
def test_started_targets_run_one_mock_per_target_and_stop_them(tmp_path: Path) -> None:
    specs = [
        TargetSpec(name="one", model="mock-small-fast", mock_engine="small-fast"),
        TargetSpec(name="two", model="mock-small-fast", mock_engine="small-fast"),
    ]
    with started_targets(specs) as targets:
        assert [t.name for t in targets] == ["one", "two"]
        assert targets[0].base_url != targets[1].base_url
        assert all(t.is_loopback and t.embedded for t in targets)
        ports = [t.endpoint.port for t in targets]
    for port in ports:  # stopped: nothing listens on those ports any more
        result = subprocess.run(
            [sys.executable, "-c", f"import socket; socket.create_connection(('127.0.0.1', {port}), 1)"],
            capture_output=True,
            timeout=30,
            env={**os.environ},
        )
        assert result.returncode != 0
