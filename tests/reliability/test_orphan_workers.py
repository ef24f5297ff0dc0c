"""A loader killed mid-run leaves no parsing process behind (they used to wait forever on
a pipe nobody writes to, a few hundred MB each)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time

import pytest

PARENT = """
import os, sys, time
from archive.ingest import workers
pool = workers.pool(2)
pids = sorted(set(pool.submit(os.getpid).result() for _ in range(8)))
futures = [pool.submit(time.sleep, 60) for _ in range(2)]  # both processes busy
print(" ".join(map(str, pids)), flush=True)
time.sleep(60)
"""


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    with open(f"/proc/{pid}/stat") as fh:  # a zombie is gone for this purpose
        return fh.read().split(")")[-1].split()[0] != "Z"


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="prctl(2) is Linux only")
def test_parsing_processes_end_with_a_killed_loader():
    parent = subprocess.Popen([sys.executable, "-c", PARENT], stdout=subprocess.PIPE,
                              text=True)
    try:
        pids = [int(p) for p in parent.stdout.readline().split()]
        assert pids and all(_alive(p) for p in pids)
        parent.send_signal(signal.SIGKILL)
        parent.wait(10)
        deadline = time.monotonic() + 10
        while any(_alive(p) for p in pids) and time.monotonic() < deadline:
            time.sleep(0.1)
        assert not [p for p in pids if _alive(p)], "parsing processes outlived their loader"
    finally:
        parent.kill()


def test_a_pool_made_in_a_short_lived_thread_keeps_its_processes():
    """The kernel's parent-death signal follows the thread that forked, so a pool a library
    caller starts from a thread that then ends must still work."""
    import threading

    from archive.ingest import workers

    made = {}

    def make() -> None:
        made["pool"] = workers.pool(2)
        made["pids"] = {made["pool"].submit(os.getpid).result() for _ in range(4)}

    t = threading.Thread(target=make)
    t.start()
    t.join()
    time.sleep(0.5)
    pool = made["pool"]
    try:
        # the same two processes still answer (a killed one would break the pool)
        after = {pool.submit(os.getpid).result(timeout=20) for _ in range(8)}
        assert len(after | made["pids"]) <= 2
    finally:
        pool.shutdown()
