"""Routed mixes: loading and validating [routing], deterministic choices, a run against mocks."""

from __future__ import annotations

import json
from collections import Counter
from pathlib import Path
from typing import Any

import pytest

from loadrun.errors import ProfileError
from loadrun.record import Record
from loadrun.routing import RouteSettings, load_routed_profile, run_routed
from loadrun.store import RECORDS_FILE, read_records
from loadrun.target_pool import LevelOverrides, TargetBill, blended_bill
from loadrun.targets import Prices

TARGETS = """
currency = "USD"
[targets.skiff]
mock_engine = "small-fast"
model = "skiff-s"
[targets.skiff.prices]
input_per_million = 0.5
output_per_million = 2.0
[targets.barge]
mock_engine = "small-fast"
model = "barge-l"
[targets.barge.prices]
input_per_million = 5.0
output_per_million = 20.0
"""

PROFILE = """
name = "pier-notes"
seed = 5
[load]
concurrency = 4
requests = 40
warmup_s = 0.0
[request]
input_tokens = {{ distribution = "uniform", min = 20, max = 200 }}
output_tokens = 6
[routing]
targets = "targets.toml"
{routes}
"""

BY_SHARE = """
[[routing.routes]]
target = "skiff"
share = 3
[[routing.routes]]
target = "barge"
share = 1
"""

BY_RULE = """
[[routing.routes]]
target = "barge"
input_tokens_above = 120
[[routing.routes]]
target = "skiff"
"""


def _write(tmp_path: Path, routes: str) -> Path:
    (tmp_path / "targets.toml").write_text(TARGETS)
    path = tmp_path / "pier-notes.toml"
    path.write_text(PROFILE.format(routes=routes))
    return path


def test_choice_is_a_function_of_the_conversation(tmp_path: Path) -> None:
    routing = load_routed_profile(_write(tmp_path, BY_SHARE)).routing
    assert routing.shares() == {"skiff": 0.75, "barge": 0.25}
    first = [routing.choose(5, number, "default", 50) for number in range(1, 4001)]
    again = [routing.choose(5, number, "default", 50) for number in range(1, 4001)]
    assert first == again
    # 4,000 draws at 25 %: the share is within 3 standard errors (0.7 points each).
    assert first.count("barge") / len(first) == pytest.approx(0.25, abs=0.021)
    rule = load_routed_profile(_write(tmp_path, BY_RULE)).routing
    assert rule.choose(5, 1, "default", 121) == "barge"
    assert rule.choose(5, 1, "default", 120) == "skiff"


@pytest.mark.parametrize(
    ("routes", "problem"),
    [
        ("", "routes: must be a non-empty array"),
        ('[[routing.routes]]\ntarget = "ferry"\nshare = 1\n', "must name a target"),
        (BY_SHARE.replace("share = 1\n", ""), "give every route a share, or none"),
        (
            BY_RULE.replace('target = "skiff"\n', 'target = "skiff"\ninput_tokens_above = 9\n'),
            "takes the rest",
        ),
        ('[[routing.routes]]\ntarget = "skiff"\nweight = 2\n', "weight: unknown key"),
        ('[[routing.routes]]\ntarget = "skiff"\nrequest_class = "cargo"\n', "no request class 'cargo'"),
    ],
)
def test_bad_routing_is_one_line_naming_the_key(tmp_path: Path, routes: str, problem: str) -> None:
    with pytest.raises(ProfileError, match=problem):
        load_routed_profile(_write(tmp_path, routes))


def test_blended_cost_per_request_and_per_million_tokens() -> None:
    """Blended figures are total cost over all requests and all tokens (arithmetic on the
    prices: common practice, no source)."""
    small, large = TargetBill(), TargetBill()
    for bill, count, tokens_in, tokens_out in ((small, 95, 100, 50), (large, 5, 1000, 400)):
        for number in range(count):
            record = Record(request_id=number, intended_ns=1, send_ns=2, end_ns=3, output_tokens=tokens_out)
            record.prompt_tokens = tokens_in
            bill.add(record)
    cheap = Prices(input_per_million=1.0, output_per_million=2.0)
    dear = Prices(input_per_million=10.0, output_per_million=30.0)
    rows = [small.describe(cheap, 10.0), large.describe(dear, 10.0)]
    small_cost = 95 * (100 * 1.0 + 50 * 2.0) / 1e6
    large_cost = 5 * (1000 * 10.0 + 400 * 30.0) / 1e6
    blended = blended_bill(rows, 100)
    assert blended["cost_per_request"] == pytest.approx((small_cost + large_cost) / 100)
    tokens = 95 * 150 + 5 * 1400
    assert blended["cost_per_million_tokens"] == pytest.approx((small_cost + large_cost) / tokens * 1e6)
    hourly = TargetBill(requests=10)
    assert hourly.cost(Prices(per_hour=3.6), seconds=100.0) == pytest.approx(0.1)


def _run(tmp_path: Path, routes: str) -> tuple[dict[str, Any], list[dict[str, Any]]]:
    routed = load_routed_profile(_write(tmp_path, routes))
    result = run_routed(
        RouteSettings(routed, LevelOverrides(time_limit_s=60.0), out_dir=tmp_path / "runs", frontier_steps=20)
    )
    assert result.folder is not None
    return result.data, read_records(result.folder / RECORDS_FILE)


def test_routed_mix_against_two_mocks(tmp_path: Path) -> None:
    data, rows = _run(tmp_path, BY_SHARE)
    routing = load_routed_profile(tmp_path / "pier-notes.toml").routing
    # Every record went where the routing says its conversation goes.
    assert rows and all(row["target"] == routing.choose(5, row["conversation"], "default", 0) for row in rows)
    by_target = Counter(row["target"] for row in rows if row["in_window"])
    blended = data["blended"]
    assert blended["requests"]["measured"] == 40 == sum(by_target.values())
    for name, entry in data["targets"].items():
        assert entry["requests"]["measured"] == by_target[name]
        assert entry["share_of_requests"] == pytest.approx(by_target[name] / 40)
    assert (
        sum(entry["latency"]["e2e"]["count"] for entry in data["targets"].values())
        == (blended["latency"]["e2e"]["count"])
    )
    # Each bill is its requests' reported tokens at its prices; the blend is both over all.
    prices = {"skiff": (0.5, 2.0), "barge": (5.0, 20.0)}
    for name, (per_input, per_output) in prices.items():
        mine = [row for row in rows if row["target"] == name and row["in_window"]]
        tokens_in = sum(row["prompt_tokens"] for row in mine)
        tokens_out = sum(row["output_tokens"] for row in mine)
        bill = data["targets"][name]["bill"]
        assert (bill["input_tokens"], bill["output_tokens"]) == (tokens_in, tokens_out)
        assert bill["cost"] == pytest.approx((tokens_in * per_input + tokens_out * per_output) / 1e6)
    costs = [entry["bill"]["cost"] for entry in data["targets"].values()]
    assert blended["cost"]["cost_per_request"] == pytest.approx(sum(costs) / 40)
    barge = data["targets"]["barge"]["bill"]
    # The frontier: written, 0 % and 100 % equal to the two targets as measured.
    frontier = json.loads((Path(data["run_folder"]) / "frontier.json").read_text())
    assert (Path(data["run_folder"]) / "frontier.png").is_file()
    assert frontier["points"][0]["p95_ms"] == data["targets"]["skiff"]["latency"]["e2e"]["p95_ms"]
    assert frontier["points"][-1]["p95_ms"] == data["targets"]["barge"]["latency"]["e2e"]["p95_ms"]
    assert frontier["points"][-1]["cost_per_request"] == pytest.approx(barge["cost_per_request"])


def test_routed_by_rule_sends_long_inputs_to_the_large_target(tmp_path: Path) -> None:
    data, rows = _run(tmp_path, BY_RULE)
    assert {row["target"] for row in rows} == {"skiff", "barge"}
    for row in rows:
        assert (row["target"] == "barge") == (row["requested_input_tokens"] > 120)
    assert "caution" in data["frontier"]


SHIPPED = Path(__file__).resolve().parent.parent / "profiles" / "multi-target"


def test_shipped_multi_target_profiles_load_and_say_how_to_run() -> None:
    from loadrun.pipeline import load_pipeline_profile
    from loadrun.profile import load_profile

    routed = load_routed_profile(SHIPPED / "harbour-desk-routed.toml")
    assert routed.routing.shares() == {"gullwing-cloud": 0.8, "tidewater-open": 0.2}
    pipeline = load_pipeline_profile(SHIPPED / "passenger-letter-pipeline.toml")
    assert [stage.name for stage in pipeline.definition.stages][:2] == ["summarize", "classify"]
    with pytest.raises(ProfileError, match="runs with `loadrun route`"):
        load_profile(SHIPPED / "harbour-desk-routed.toml")
    with pytest.raises(ProfileError, match="runs with `loadrun pipeline`"):
        load_profile(SHIPPED / "passenger-letter-pipeline.toml")


def test_route_command_on_the_shipped_profile(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """The README's command, shortened: blended figures printed, the frontier plot written."""
    from loadrun.cli import main

    main(
        [
            "route",
            str(SHIPPED / "harbour-desk-routed.toml"),
            "-n",
            "24",
            "--warmup",
            "0",
            "--out",
            str(tmp_path),
        ]
    )
    printed = capsys.readouterr().out
    assert "blended mix" in printed and "what-if" in printed
    (folder,) = tmp_path.glob("*-harbour-desk-routed-routed")
    data = json.loads((folder / "routed.json").read_text())
    assert data["blended"]["requests"]["measured"] == 24
    assert data["blended"]["cost"]["cost_per_request"] > 0
    assert (folder / "frontier.png").is_file() and (folder / "frontier.svg").is_file()
