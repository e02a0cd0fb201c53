"""Exports of records and summaries as CSV and Parquet (pandas; Parquet through pyarrow)."""

from __future__ import annotations

import importlib.util
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path

import pandas as pd
import pytest

from loadrun.compare import CompareSettings, compare
from loadrun.errors import UsageError
from loadrun.export import export_folder, records_frame, summaries_frame
from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.runner import MeasureSettings, measure
from loadrun.store import read_records
from loadrun.targets import TargetSpec

pytestmark = pytest.mark.slow
PROFILE = Profile(
    name="export", request=RequestSpec(input_tokens=16, output_tokens=8), load=LoadSpec(warmup_s=0.1)
)
needs_pyarrow = pytest.mark.skipif(
    importlib.util.find_spec("pyarrow") is None, reason="pyarrow is not installed (extra 'parquet')"
)


@pytest.fixture(scope="module")
def run_folder(tmp_path_factory: pytest.TempPathFactory) -> Path:
    result = measure(
        MeasureSettings(profile=PROFILE, concurrency=2, requests=10, out_dir=tmp_path_factory.mktemp("run"))
    )
    assert result.folder is not None
    return result.folder


@pytest.fixture(scope="module")
def comparison_folder(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    twins = (
        TargetSpec(name="north", model="mock-small-fast", mock_engine="small-fast"),
        TargetSpec(name="south", model="mock-small-fast", mock_engine="small-fast"),
    )
    result = compare(
        CompareSettings(
            targets=twins,
            profile=PROFILE,
            levels=(2,),
            rounds=2,
            requests_per_round=6,
            warmup_s=0.1,
            resamples=500,
            out_dir=tmp_path_factory.mktemp("compare"),
            write_report=False,
        )
    )
    yield result.folder


def test_records_of_a_run_one_row_each_with_derived_latencies(run_folder: Path) -> None:
    rows = read_records(run_folder / "records.jsonl")
    frame = records_frame(run_folder)
    assert len(frame) == len(rows)
    assert frame["id"].tolist() == [row["id"] for row in rows]
    first = rows[0]
    assert frame.loc[0, "ttft_ms"] == pytest.approx((first["first_token_us"] - first["intended_us"]) / 1000)
    assert frame.loc[0, "e2e_ms"] == pytest.approx((first["end_us"] - first["intended_us"]) / 1000)
    assert frame["chunk_offsets_us"].map(type).eq(str).all()  # lists become JSON text
    summaries = summaries_frame(run_folder)
    assert len(summaries) == 1
    assert summaries.loc[0, "requests.measured"] == 10
    assert "latency.ttft.p50_ms" in summaries.columns
    assert not any(column.startswith(("histograms", "windows")) for column in summaries.columns)


def test_csv_files_of_a_comparison(comparison_folder: Path, tmp_path: Path) -> None:
    written = export_folder(comparison_folder, "csv", tmp_path)
    assert sorted(path.name for path in written) == [
        "comparisons.csv",
        "records.csv",
        "summaries.csv",
        "targets.csv",
    ]
    records = pd.read_csv(tmp_path / "records.csv")
    assert set(records["target"]) == {"north", "south"}
    assert set(records["round"]) == {1, 2}
    assert (records.loc[records["in_window"], "outcome"] == "ok").all()
    assert len(pd.read_csv(tmp_path / "summaries.csv")) == 4  # two targets, two rounds
    targets = pd.read_csv(tmp_path / "targets.csv")
    assert targets["target"].tolist() == ["north", "south"]
    comparisons = pd.read_csv(tmp_path / "comparisons.csv")
    assert len(comparisons) == 4 * 2  # four metrics, p50 and p90, one pair
    assert set(comparisons["verdict"]) <= {"faster", "slower", "no difference"}


@needs_pyarrow
def test_parquet_holds_the_same_table_as_csv(comparison_folder: Path, tmp_path: Path) -> None:
    export_folder(comparison_folder, "csv", tmp_path / "csv")
    export_folder(comparison_folder, "parquet", tmp_path / "parquet")
    for name in ("records", "summaries", "targets", "comparisons"):
        from_csv = pd.read_csv(tmp_path / "csv" / f"{name}.csv")
        from_parquet = pd.read_parquet(tmp_path / "parquet" / f"{name}.parquet")
        assert list(from_parquet.columns) == list(from_csv.columns), name
        assert len(from_parquet) == len(from_csv), name
    records = pd.read_parquet(tmp_path / "parquet" / "records.parquet")
    assert records["ttft_ms"].dropna().gt(0).all()


def test_bad_requests_are_usage_errors(run_folder: Path, tmp_path: Path) -> None:
    with pytest.raises(UsageError, match="unknown export format"):
        export_folder(run_folder, "xlsx")
    with pytest.raises(UsageError, match="no such run folder"):
        export_folder(tmp_path / "missing")
    with pytest.raises(UsageError, match="nothing to export"):
        export_folder(tmp_path)


def test_the_export_command(run_folder: Path, tmp_path: Path) -> None:
    result = subprocess.run(
        [sys.executable, "-m", "loadrun", "export", str(run_folder), "--out", str(tmp_path)],
        capture_output=True,
        text=True,
        timeout=60,
        stdin=subprocess.DEVNULL,
    )
    assert result.returncode == 0, result.stderr
    assert (tmp_path / "records.csv").is_file() and (tmp_path / "summaries.csv").is_file()
    bad = subprocess.run(
        [sys.executable, "-m", "loadrun", "export", str(run_folder), "--format", "xlsx"],
        capture_output=True,
        text=True,
        timeout=60,
        stdin=subprocess.DEVNULL,
    )
    assert bad.returncode == 2 and bad.stderr.strip().splitlines()[-1].startswith("UsageError:")
