"""While a load level runs, the garbage collector's full collections walk only what the
level made: the objects that existed before are frozen (gc.freeze, Python's gc module
documentation) and thawed after. A full collection over the command line's imports paused
a run for 60-70 ms, which every request in flight read as server latency.

The counts come from fresh interpreters, since this test process freezes its own imports
(tests/conftest.py)."""

from __future__ import annotations

import gc
import json
import subprocess
import sys
from typing import Any

import anyio

from loadrun.driver import ClosedLoopPlan, run_closed_loop
from loadrun.protocol import ChatRequest
from loadrun.record import Record

PROBE = """
import gc, json
import loadrun.cli  # the command line's imports: pandas, scipy, rich, httpx, ...
from loadrun.collector_hold import old_objects_held
{before}
gc.collect()
old = len(gc.get_objects(generation=2))
with old_objects_held():
    inside = len(gc.get_objects(generation=2))
    frozen = gc.get_freeze_count()
print(json.dumps({{"old": old, "inside": inside, "frozen": frozen, "after": gc.get_freeze_count()}}))
"""


def probe(before: str = "") -> dict[str, Any]:
    done = subprocess.run(
        [sys.executable, "-c", PROBE.format(before=before)], capture_output=True, text=True, timeout=120
    )
    assert done.returncode == 0, done.stderr
    result: dict[str, Any] = json.loads(done.stdout)
    return result


def test_a_level_leaves_the_old_objects_out_of_full_collections_and_thaws_them_after() -> None:
    counts = probe()
    assert counts["old"] > 50_000  # the imports: tens of thousands of objects to walk
    assert counts["inside"] < counts["old"] / 100
    assert counts["frozen"] >= counts["old"]
    assert counts["after"] == 0


def test_objects_someone_else_froze_stay_frozen() -> None:
    counts = probe(before="gc.freeze(); mine = gc.get_freeze_count()")
    assert counts["frozen"] > 0 and counts["after"] > 0.9 * counts["frozen"]  # not thawed


def test_the_drivers_hold_old_objects_while_requests_run() -> None:
    seen: list[int] = []

    async def execute(request: ChatRequest, record: Record) -> Record:
        seen.append(gc.get_freeze_count())
        record.send_ns = record.first_token_ns = record.end_ns = record.intended_ns + 1
        return record

    async def main() -> None:
        plan = ClosedLoopPlan(concurrency=1, requests=3, warmup_s=0.0)
        chat = ChatRequest(messages=({"role": "user", "content": "tide times"},), max_tokens=1)
        await run_closed_loop(plan, execute, iter([chat] * 3), lambda record: None)

    gc.unfreeze()  # this process froze its imports (conftest.py): start from none frozen
    try:
        anyio.run(main)
        assert len(seen) == 3 and min(seen) > 0
        assert gc.get_freeze_count() == 0
    finally:
        gc.freeze()
