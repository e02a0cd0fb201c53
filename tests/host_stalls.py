"""Freeze a process tree for a few milliseconds at random moments, as a busy host does to a VM.

A developer's tool, not a test: run the suite, or one test, under it to see whether a timing
test survives the stalls a shared CI machine makes (DEVELOPERS.md, "Timing tests on a shared
machine"). It stops every process in the tree of ROOT_PID (SIGSTOP), waits, and continues
them (SIGCONT), until ROOT_PID exits, then prints how many stalls it made.

    python -m pytest tests/test_gate_mock.py & python tests/host_stalls.py $! --every-ms 1000

Only the given tree is touched; a stall always ends with SIGCONT, even on Ctrl-C.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import random
import signal
import time


def process_tree(root: int) -> list[int]:
    """``root`` and every process descended from it, read from /proc (Linux)."""
    children: dict[int, list[int]] = {}
    for name in os.listdir("/proc"):
        if not name.isdigit():
            continue
        try:
            with open(f"/proc/{name}/stat") as stat:
                fields = stat.read().rsplit(")", 1)[1].split()
        except OSError:
            continue  # it ended while we looked
        children.setdefault(int(fields[1]), []).append(int(name))
    tree, todo = [], [root]
    while todo:
        pid = todo.pop()
        tree.append(pid)
        todo += children.get(pid, [])
    return tree


def signal_all(pids: list[int], sig: signal.Signals) -> None:
    for pid in pids:
        with contextlib.suppress(ProcessLookupError):  # it ended meanwhile
            os.kill(pid, sig)


def alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    return True


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("root_pid", type=int)
    parser.add_argument("--every-ms", type=float, default=1000.0, help="mean time between stalls")
    parser.add_argument("--min-ms", type=float, default=2.0, help="shortest stall")
    parser.add_argument("--max-ms", type=float, default=15.0, help="longest stall")
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    rng = random.Random(args.seed)
    count, frozen_s = 0, 0.0
    while True:
        time.sleep(rng.expovariate(1000.0 / args.every_ms))
        if not alive(args.root_pid):
            break
        pids = process_tree(args.root_pid)
        stall_s = rng.uniform(args.min_ms, args.max_ms) / 1000
        try:
            signal_all(pids, signal.SIGSTOP)
            time.sleep(stall_s)
        finally:
            signal_all(pids, signal.SIGCONT)
        count += 1
        frozen_s += stall_s
    print(f"{count} stalls, {frozen_s:.1f} s frozen in all")


if __name__ == "__main__":
    main()
