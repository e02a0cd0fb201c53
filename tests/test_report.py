"""The HTML report: every section, self-contained, readable in a real browser.

The browser check runs Debian's chromium headless (installed by .ci/run); where it is
absent that test is skipped with the reason.
"""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
import uuid
from collections.abc import Iterator
from html.parser import HTMLParser
from pathlib import Path

import pytest

from loadrun.compare import CompareSettings, compare
from loadrun.profile import LoadSpec, Profile, RequestSpec
from loadrun.report.html import REPORT_FILE, SECTIONS, render_report, write_report
from loadrun.runner import MeasureSettings, measure
from loadrun.targets import load_targets

REPO = Path(__file__).resolve().parent.parent
DEMO = REPO / "targets" / "harbour-desk-candidates.toml"
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
SECTION_IDS = [section_id for section_id, _title in SECTIONS]


class _Page(HTMLParser):
    """What the checks need from a page: element ids, outside references, scripts, plots."""

    def __init__(self) -> None:
        super().__init__()
        self.ids: list[str] = []
        self.references: list[str] = []
        self.tags: dict[str, int] = {}
        self.text: list[str] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags[tag] = self.tags.get(tag, 0) + 1
        for name, value in attrs:
            if name == "id" and value:
                self.ids.append(value)
            if name in ("src", "href", "xlink:href", "action", "srcset", "poster") and value:
                self.references.append(value)

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def parse(html: str) -> _Page:
    page = _Page()
    page.feed(html)
    return page


def capacity_json() -> dict[str, object]:
    """A capacity.json shaped like the capacity search's (steps, fits, capacity, advice)."""
    steps = []
    for index, load in enumerate([1, 2, 4, 8, 16]):
        rate = 10.0 * load / (1 + 0.05 * (load - 1) + 0.002 * load * (load - 1))
        steps.append(
            {
                "index": index,
                "load": float(load),
                "concurrency": load,
                "throughput": {"requests_per_s": rate},
                "latency": {
                    "ttft": {"p50_ms": 20.0 + load, "p99_ms": 30.0 + 3 * load},
                    "e2e": {"p99_ms": 100.0 * load},
                },
                "verdict": "within" if load < 16 else "over",
            }
        )
    return {
        "kind": "loadrun.capacity",
        "axis": "concurrency",
        "steps": steps,
        "capacity": {"found": True, "load": 11.5, "limited_by": "ttft p99 <= 60 ms"},
        "sigma": 0.05,
        "kappa": 0.002,
        "lambda": 10.0,
        "fits": {"usl": {"sigma": 0.05, "kappa": 0.002, "lambda": 10.0}},
        "advice": {"lines": ["Capacity per replica: 11.5 requests in flight.", "Add a replica at 9."]},
    }


@pytest.fixture(scope="module")
def comparison_folder(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    """A small real comparison of the demo's three mock targets, with a capacity.json beside it."""
    out = tmp_path_factory.mktemp("compare")
    demo = load_targets(DEMO)
    result = compare(
        CompareSettings(
            targets=demo.targets,
            profile=Profile(name="report-check", request=RequestSpec(input_tokens=16, output_tokens=16)),
            levels=(4,),
            rounds=2,
            requests_per_round=12,
            warmup_s=0.1,
            resamples=1000,
            out_dir=out,
            description=demo.description,
            write_report=False,
        )
    )
    (result.folder / "capacity.json").write_text(json.dumps(capacity_json()), encoding="utf-8")
    write_report(result.folder)
    yield result.folder


@pytest.mark.slow
def test_the_report_has_every_section_and_no_outside_asset(comparison_folder: Path) -> None:
    html = (comparison_folder / REPORT_FILE).read_text(encoding="utf-8")
    page = parse(html)
    for section_id in SECTION_IDS:
        assert section_id in page.ids, section_id
    outside = [ref for ref in page.references if not ref.startswith(("#", "data:"))]
    assert not outside, outside
    assert "script" not in page.tags and "link" not in page.tags and "img" not in page.tags
    assert not re.search(r"url\((?!#)", html) and "@import" not in html  # only in-page references
    # CDFs, percentiles over time, outcomes, three pair plots, capacity curves.
    assert page.tags.get("svg", 0) >= 7
    text = " ".join(page.text)
    for name in ("gullwing-cloud", "tidewater-open", "quay-box"):
        assert name in text
    assert "gullwing-cloud is faster than tidewater-open" in text
    assert "Capacity per replica: 11.5 requests in flight." in text
    assert "bundled mock server" in text  # a caution
    assert "per hour" in text and "USD" in text  # prices and costs


@pytest.mark.slow
def test_a_single_run_folder_gets_the_same_sections(tmp_path: Path) -> None:
    profile = Profile(
        name="single", request=RequestSpec(input_tokens=16, output_tokens=8), load=LoadSpec(warmup_s=0.1)
    )
    result = measure(MeasureSettings(profile=profile, concurrency=2, requests=10, out_dir=tmp_path))
    assert result.folder is not None
    page = parse(render_report(result.folder))
    for section_id in SECTION_IDS:
        assert section_id in page.ids, section_id
    text = " ".join(page.text)
    assert "a single run, not a comparison" in text
    assert "No capacity search in this folder" in text

    # Records that carry request classes and answer checks (profiles with a mix and checks).
    records = result.folder / "records.jsonl"
    rows = [json.loads(line) for line in records.read_text(encoding="utf-8").splitlines()]
    for index, row in enumerate(rows):
        row.update({"class": "question" if index % 2 else "summary", "compliant": index % 3 != 0})
    records.write_text("".join(json.dumps(row) + "\n" for row in rows), encoding="utf-8")
    text = " ".join(parse(render_report(result.folder)).text)
    assert "Per request class" in text and "compliant" in text


def test_capacity_folder_alone_and_unreadable_capacity_files(tmp_path: Path) -> None:
    (tmp_path / "capacity.json").write_text(json.dumps(capacity_json()), encoding="utf-8")
    page = parse(render_report(tmp_path))
    assert all(section_id in page.ids for section_id in SECTION_IDS)
    assert page.tags.get("svg", 0) == 1
    assert "Add a replica at 9." in " ".join(page.text)
    assert ">fit<" in render_report(tmp_path)  # the fitted USL curve is drawn on a concurrency axis
    on_rate = capacity_json() | {"axis": "rate"}
    (tmp_path / "capacity.json").write_text(json.dumps(on_rate), encoding="utf-8")
    assert ">fit<" not in render_report(tmp_path)  # ... and not on a rate axis, where it means nothing
    (tmp_path / "capacity.json").write_text(json.dumps({"steps": "not a list", "fits": 3}), encoding="utf-8")
    assert "holds no steps this report can read" in render_report(tmp_path)


def test_the_report_command_refuses_what_is_not_a_run_folder(tmp_path: Path) -> None:
    for folder in (tmp_path / "missing", tmp_path):
        result = subprocess.run(
            [sys.executable, "-m", "loadrun", "report", str(folder)],
            capture_output=True,
            text=True,
            timeout=60,
            stdin=subprocess.DEVNULL,
        )
        assert result.returncode == 2, result.stderr
        assert "Traceback" not in result.stderr
        assert result.stderr.strip().splitlines()[-1].startswith("UsageError:")


# --- in a real browser ------------------------------------------------------------------------


def run_chromium(tmp_path: Path, *args: str) -> subprocess.CompletedProcess[str]:
    assert CHROMIUM is not None
    command = [
        CHROMIUM,
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={tmp_path / f'chromium-{uuid.uuid4().hex}'}",
        "--enable-logging=stderr",
        "--v=0",
        *args,
    ]
    return subprocess.run(command, capture_output=True, text=True, timeout=90, stdin=subprocess.DEVNULL)


def console_messages(stderr: str) -> list[str]:
    """Console output of the page (messages, errors, uncaught exceptions) as chromium logs it."""
    return [line for line in stderr.splitlines() if ":CONSOLE" in line]


needs_chromium = pytest.mark.skipif(
    CHROMIUM is None, reason="chromium is not installed (Debian package chromium; .ci/run installs it)"
)


@needs_chromium
@pytest.mark.slow
def test_the_console_check_does_catch_errors(tmp_path: Path) -> None:
    """The check below must be able to fail: a page that logs an error is caught."""
    page = tmp_path / "broken.html"
    page.write_text(
        '<!DOCTYPE html><p>x</p><script>console.error("caught-marker")</script>', encoding="utf-8"
    )
    result = run_chromium(tmp_path, "--dump-dom", page.as_uri())
    assert result.returncode == 0, result.stderr[-2000:]
    assert any("caught-marker" in line for line in console_messages(result.stderr))


@needs_chromium
@pytest.mark.slow
def test_the_report_opens_in_chromium_without_console_errors(comparison_folder: Path, tmp_path: Path) -> None:
    report = comparison_folder / REPORT_FILE
    loaded = run_chromium(tmp_path, "--dump-dom", report.as_uri())
    assert loaded.returncode == 0, loaded.stderr[-2000:]
    assert console_messages(loaded.stderr) == []
    dom = parse(loaded.stdout)
    for section_id in SECTION_IDS:
        assert section_id in dom.ids, section_id
    assert dom.tags.get("svg", 0) >= 7

    screenshot = tmp_path / "report.png"
    shot = run_chromium(
        tmp_path,
        "--hide-scrollbars",
        "--window-size=1280,2400",
        f"--screenshot={screenshot}",
        report.as_uri(),
    )
    assert shot.returncode == 0, shot.stderr[-2000:]
    assert console_messages(shot.stderr) == []
    from PIL import Image

    with Image.open(screenshot) as image:
        assert image.size == (1280, 2400)
        colors = image.convert("RGB").getcolors(maxcolors=1_000_000) or []
    assert len(colors) > 50  # text and plots, not a blank page
    print(f"report screenshot: {screenshot}")
