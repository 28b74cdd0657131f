#!/usr/bin/env python3
"""One timed run of a command, as a whole process: appends "seconds max_rss_kb" to LOG.

Usage: python3 bench/timeit.py LOG COMMAND [ARGS...]

The clock starts right before the process is spawned and stops when `wait4` reaps it, so the
figure is the process's own life: exec, its run, and its exit. Timed from a shell with
`date` and `/usr/bin/time` instead, each run also counted the start of `/usr/bin/time` and
of a `date` process, about 2.5 ms on `/bin/true` here: 4-5% of a 60 ms run, 0.2% of a 1.5 s
one. Peak RSS is the child's `ru_maxrss` (KB on Linux), as `/usr/bin/time -f %M` reports it.
"""
import os
import sys
import time


def main() -> int:
    if len(sys.argv) < 3:
        print("usage: timeit.py LOG COMMAND [ARGS...]", file=sys.stderr)
        return 2
    log, argv = sys.argv[1], sys.argv[2:]
    devnull = os.open(os.devnull, os.O_WRONLY)
    actions = [
        (os.POSIX_SPAWN_DUP2, devnull, 1),
        (os.POSIX_SPAWN_DUP2, devnull, 2),
    ]
    start = time.perf_counter()
    pid = os.posix_spawnp(argv[0], argv, os.environ, file_actions=actions)
    _, _, usage = os.wait4(pid, 0)
    seconds = time.perf_counter() - start
    with open(log, "a", encoding="utf-8") as f:
        f.write(f"{seconds:.4f} {usage.ru_maxrss}\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
