#!/usr/bin/env python3
"""One timed run of a command, as a whole process: appends its wall-clock seconds to LOG.

Usage: python3 bench/timeit.py LOG COMMAND [ARGS...]

The clock starts right before the process is spawned and stops when `wait4` reaps it, so the
figure is the process's own life: exec, its run, and its exit. Timed from a shell with
`date` and `/usr/bin/time` instead, each run also counted the start of `/usr/bin/time` and
of a `date` process, about 2 ms on `/bin/true` here: 3% of a 70 ms run, 0.1% of a 1.5 s one.

No peak RSS here: a process started from Python reports, as its `ru_maxrss`, at least the
Python parent's resident memory at the spawn (the kernel keeps the high-water mark of the
memory the child started in across `exec`), about 13 MB; `bench/run.sh` takes peak RSS from
a separate run under `/usr/bin/time`, whose own floor is about 1 MB.
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
    os.waitpid(pid, 0)
    seconds = time.perf_counter() - start
    with open(log, "a", encoding="utf-8") as f:
        f.write(f"{seconds:.4f}\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
