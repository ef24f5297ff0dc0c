"""How the ``nodekeep`` program ends: what the interpreter does at exit that reaches outside
the process is done (threads waited for, ``atexit`` functions, streams flushed), the tearing
down of modules is not (:func:`archive.cli.main.end_process`)."""

from __future__ import annotations

import os
import subprocess
import sys

ENDING = """
import atexit, sys, threading, time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from archive.cli.main import end_process

out = Path(sys.argv[1])
def at_exit():  # runs after the threads were waited for
    (out / "atexit").write_text("after the thread" if (out / "thread").exists() else "early")
atexit.register(at_exit)
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
sys.stdout.write("x" * 2_000_000)
sys.stdout.write("last words")  # stays in the buffers until flushed
sys.stderr.write("said on stderr")  # no line end: still buffered
end_process(int(sys.argv[2]) if sys.argv[2].isdigit() else sys.argv[2] or None)
"""


def _end(tmp_path, code: str) -> subprocess.CompletedProcess:
    # buffered streams, as in a shell pipeline (PYTHONUNBUFFERED would hide a lost flush)
    env = {k: v for k, v in os.environ.items() if k != "PYTHONUNBUFFERED"}
    return subprocess.run([sys.executable, "-c", ENDING, str(tmp_path), code],
                          capture_output=True, text=True, timeout=60, env=env)


def test_the_process_ends_after_threads_exit_functions_and_flushes(tmp_path):
    done = _end(tmp_path, "3")
    assert done.returncode == 3, done.stderr
    assert len(done.stdout) == 2_000_010 and done.stdout.endswith("last words")
    assert done.stderr == "said on stderr"
    assert (tmp_path / "thread").read_text() == "finished"
    assert (tmp_path / "atexit").read_text() == "after the thread"
    assert not (tmp_path / "teardown").exists()


def test_ctrl_c_while_waiting_at_exit_keeps_the_status(tmp_path):
    """A command that finished is not turned into an interrupted one by a Ctrl-C while
    the process waits for a thread (the interpreter reports such an error and keeps the
    status)."""
    code = ("import os, signal, threading, time\n"
            "from archive.cli.main import end_process\n"
            "threading.Thread(target=time.sleep, args=(1.0,)).start()\n"
            "threading.Timer(0.2, os.kill, (os.getpid(), signal.SIGINT)).start()\n"
            "end_process(0)\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                          timeout=60)
    assert done.returncode == 0, done.stderr
    assert "Exception ignored while waiting for threads at exit: KeyboardInterrupt" \
        in done.stderr


def test_exit_statuses_as_the_interpreter_gives_them(tmp_path):
    # Python documentation, sys.exit: None is 0, an integer is the status, any other
    # object is printed to stderr and gives 1
    assert _end(tmp_path, "").returncode == 0
    done = _end(tmp_path, "stopped by the operator")
    assert done.returncode == 1 and done.stderr == "said on stderrstopped by the operator\n"
    assert _end(tmp_path, "258").returncode == 2  # a status is taken modulo 256 (POSIX)


def test_a_failed_flush_gives_the_interpreters_status(tmp_path):
    # the interpreter's status when flushing stdout fails at exit is 120 whatever the
    # status asked for (Python documentation, sys.exit and Py_FinalizeEx); a stream
    # already closed is not flushed and is no failure
    code = ("import sys\n"
            "class Broken:\n"
            "    closed = False\n"
            "    def write(self, s): return len(s)\n"
            "    def flush(self): raise BrokenPipeError(32, 'Broken pipe')\n"
            "if sys.argv[1] == 'broken':\n"
            "    sys.stdout = Broken()\n"
            "else:\n"
            "    sys.stdout.close()\n"
            "from archive.cli.main import end_process\n"
            "end_process(int(sys.argv[2]))\n")
    for how, asked, status in (("broken", 0, 120), ("broken", 4, 120), ("closed", 0, 0),
                               ("closed", 4, 4)):
        done = subprocess.run([sys.executable, "-c", code, how, str(asked)],
                              capture_output=True, text=True, timeout=60)
        assert done.returncode == status, (how, asked, done.stderr)
        assert ("BrokenPipeError" in done.stderr) == (how == "broken")


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
