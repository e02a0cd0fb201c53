"""Opt-in benchmark: how long a full garbage collection pauses a loadrun process, with the
objects from before the level held back (loadrun/collector_hold.py) and without, side by
side in one fresh interpreter that has imported the command line. Medians of 9 each.
Run with: pytest -m bench -s tests/bench/test_collector_pause.py. No timed asserts.
"""

from __future__ import annotations

import json
import subprocess
import sys

import pytest

PROBE = """
import gc, json, statistics, time
import loadrun.cli
from loadrun.collector_hold import old_objects_held

def full_collection_ms():
    started = time.perf_counter()
    gc.collect()
    return (time.perf_counter() - started) * 1e3

plain, held = [], []
for _ in range(9):
    plain.append(full_collection_ms())
    with old_objects_held():
        held.append(full_collection_ms())
print(json.dumps({"plain": statistics.median(plain), "held": statistics.median(held),
                  "objects": len(gc.get_objects())}))
"""


@pytest.mark.bench
def test_full_collection_pause_with_and_without_the_hold() -> None:
    done = subprocess.run([sys.executable, "-c", PROBE], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    result = json.loads(done.stdout)
    print(
        f"\nfull collection over {result['objects']} objects: {result['plain']:.1f} ms plain, "
        f"{result['held'] * 1000:.0f} us with the old objects held "
        f"({result['plain'] / max(result['held'], 1e-6):.0f}x shorter)"
    )
