"""How the ``nodekeep`` program ends: what the interpreter does at exit that reaches outside
the process is done (threads waited for, ``atexit`` functions, streams flushed), the tearing
down of modules is not (:func:`archive.cli.main.end_process`)."""

from __future__ import annotations

import subprocess
import sys

ENDING = """
import atexit, sys, threading, time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from archive.cli.main import end_process

out = Path(sys.argv[1])
atexit.register(lambda: (out / "atexit").write_text("ran"))
def late():
    time.sleep(0.3)
    (out / "thread").write_text("finished")
threading.Thread(target=late).start()  # not a daemon: waited for
pool = ThreadPoolExecutor(1)  # never shut down: its idle thread is told to stop
pool.submit(int).result()
class Kept:
    def __del__(self):
        (out / "teardown").write_text("ran")
kept = Kept()  # freed only by the module teardown, which is skipped
sys.stdout.write("x" * 2_000_000)  # buffered, flushed at the end
end_process(int(sys.argv[2]) if sys.argv[2].isdigit() else sys.argv[2] or None)
"""


def _end(tmp_path, code: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", ENDING, str(tmp_path), code],
                          capture_output=True, text=True, timeout=60)


def test_the_process_ends_after_threads_exit_functions_and_flushes(tmp_path):
    done = _end(tmp_path, "3")
    assert done.returncode == 3, done.stderr
    assert len(done.stdout) == 2_000_000
    assert (tmp_path / "atexit").read_text() == "ran"
    assert (tmp_path / "thread").read_text() == "finished"
    assert not (tmp_path / "teardown").exists()


def test_exit_statuses_as_the_interpreter_gives_them(tmp_path):
    # Python documentation, sys.exit: None is 0, an integer is the status, any other
    # object is printed to stderr and gives 1
    assert _end(tmp_path, "").returncode == 0
    done = _end(tmp_path, "stopped by the operator")
    assert done.returncode == 1 and done.stderr.strip() == "stopped by the operator"
    assert _end(tmp_path, "258").returncode == 2  # a status is taken modulo 256 (POSIX)


def test_a_closed_output_gives_the_interpreters_status(tmp_path):
    # the interpreter's status when flushing stdout fails at exit is 120 (Python
    # documentation, sys.exit / Py_FinalizeEx)
    code = ("import sys\n"
            "class Closed:\n"
            "    def write(self, s): return len(s)\n"
            "    def flush(self): raise BrokenPipeError(32, 'Broken pipe')\n"
            "sys.stdout = Closed()\n"
            "from archive.cli.main import end_process\n"
            "end_process(0)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60)
    assert done.returncode == 120


def test_the_program_ends_this_way_with_its_output_and_status(tmp_path):
    """``python -m archive`` (the console script calls the same function): a command's
    whole output and its status, a failure's message and status."""
    init = subprocess.run([sys.executable, "-m", "archive", "init", str(tmp_path / "arc")],
                          capture_output=True, text=True, timeout=120)
    assert init.returncode == 0, init.stderr
    made = subprocess.run([sys.executable, "-m", "archive", "-A", str(tmp_path / "arc"),
                           "history", "--json"], capture_output=True, text=True, timeout=120)
    assert made.returncode == 0 and made.stdout.rstrip().endswith("]"), made.stderr
    missing = subprocess.run([sys.executable, "-m", "archive", "-A", str(tmp_path / "none"),
                              "status"], capture_output=True, text=True, timeout=120)
    assert missing.returncode == 1
    assert missing.stderr.startswith("error: no nodekeep archive found")
    usage = subprocess.run([sys.executable, "-m", "archive", "--no-such-option"],
                           capture_output=True, text=True, timeout=120)
    assert usage.returncode == 2 and "No such option" in usage.stderr
