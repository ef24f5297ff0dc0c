"""Processes that parse logs, started early so that their start-up overlaps the caller's.

A new process needs most of a second before it parses its first byte: numba's runtime and
the cached compiled reader load on first use. :func:`prestart` forks the parsing processes
at once and has each load the reader on a thread of its own while the caller goes on
(opening the catalog, looking up what is loaded) and while the process hashes and copies
its first file; :func:`archive.ingest.load.load_fix_files` takes them with :func:`take`.
A parsing process never loads the catalog, pandas or scipy's linear algebra. Only the
standard library is imported here, so calling it first costs nothing.
"""

from __future__ import annotations

import contextlib
import datetime as dt
import os
import signal
import sys
from concurrent.futures import ProcessPoolExecutor

_POOL: ProcessPoolExecutor | None = None
_SIZE = 0
_SAMPLE = (b"$GPGGA,123519,4807.038,N,01131.000,E,1,08,0.9,545.4,M,46.9,M,,*47\r\n"
           b"$GPRMC,123519,A,4807.038,N,01131.000,E,022.4,084.4,230394,003.1,W*6A\r\n")


def context():
    """The start method of parsing processes: fork where there is one (they inherit what is
    loaded), else spawn."""
    import multiprocessing as mp

    return mp.get_context("fork" if "fork" in mp.get_all_start_methods() else "spawn")


PR_SET_PDEATHSIG = 1  # Linux prctl(2) option: the signal sent when the parent ends


def die_with_parent(parent: int, main_thread: bool = True) -> None:
    """Have the kernel end this parsing process when the process that started it ends, by
    any means (a loader killed mid-run otherwise leaves its parsing processes waiting on a
    pipe nobody writes to, each holding a few hundred MB). Linux only (prctl(2)
    PR_SET_PDEATHSIG). The kernel sends the signal when the *thread* that forked the
    process ends, so it is asked for only when that thread was the main thread
    (``main_thread``; the command line's case): a pool a library caller starts from a
    short-lived thread keeps its processes. A parent already gone when this runs ends the
    process at once."""
    if main_thread and sys.platform.startswith("linux"):
        import ctypes

        with contextlib.suppress(OSError, AttributeError):
            ctypes.CDLL(None, use_errno=True).prctl(PR_SET_PDEATHSIG, int(signal.SIGKILL))
    if os.getppid() != parent:
        os._exit(1)


def start(parent: int, warm_up: bool, main_thread: bool = True) -> None:
    """Initializer of a parsing process: tie it to its parent, then (``warm_up``) import the
    parsing code and load the compiled reader on a thread of its own, so that the process
    takes its first task at once: the hash and raw copy of a file, which need no compiled
    code, run while the reader loads, and the parse waits for it (:func:`ready`)."""
    die_with_parent(parent, main_thread)
    if warm_up:
        import threading

        import archive.ingest.parse_file  # what a task needs before the reader
        import archive.ingest.parse_stream  # noqa: F401

        global _WARMING
        _WARMING = threading.Event()
        threading.Thread(target=_warm_up, args=(_WARMING,), name="reader-warm-up",
                         daemon=True).start()


_WARMING = None  # set (a threading.Event) while a warm-up thread loads the reader


def _warm_up(done) -> None:
    try:
        skip_blas_probe()
        warm()
    except Exception:  # noqa: BLE001 - the parse meets the error again, per file
        pass
    finally:
        done.set()


def ready() -> None:
    """Wait until this process's warm-up thread (if any) has loaded the reader: the code
    that parses imports the reader's modules only after it, never beside it."""
    if _WARMING is not None:
        _WARMING.wait()


def skip_blas_probe() -> None:
    """Have numba skip its search for a BLAS library in this process (call it only in a
    process that parses and never solves). numba imports ``scipy.linalg`` for it (about
    0.4 s) when its first compiled function loads; the reader does no linear algebra
    (numba treats a missing scipy as no BLAS: only ``np.dot``-style functions would be
    compiled without it). No-op where numba's array functions are loaded already."""
    if "numba.np.arraymath" in sys.modules or "scipy.linalg" in sys.modules:
        return
    sys.modules["scipy.linalg"] = None  # type: ignore[assignment]  # import raises ImportError
    try:
        import numba.np.arraymath  # noqa: F401
    finally:
        del sys.modules["scipy.linalg"]


def pool(n: int, warm_up: bool = False) -> ProcessPoolExecutor:
    """``n`` parsing processes (started on demand) that end with the calling process (when
    called from the main thread, see :func:`die_with_parent`)."""
    import threading

    main = threading.current_thread() is threading.main_thread()
    return ProcessPoolExecutor(n, mp_context=context(), initializer=start,
                               initargs=(os.getpid(), warm_up, main))


def warm() -> None:
    """Load the compiled reader by reading two sentences (DePriest's GGA and RMC examples)."""
    from archive.ingest.nmea import parse_nmea

    parse_nmea(_SAMPLE, node="warm-up", raw_hash="0" * 64, date=dt.date(2000, 1, 1))


def prestart(n: int) -> None:
    """Start ``n`` parsing processes now, each loading the reader (no-op if started)."""
    global _POOL, _SIZE
    if _POOL is not None or n < 1:
        return
    _POOL = pool(n, warm_up=True)
    _SIZE = n
    for _ in range(n):  # a process starts per task submitted, up to n
        _POOL.submit(os.getpid)


def take() -> tuple[ProcessPoolExecutor | None, int]:
    """The started processes and their number (``(None, 0)`` if none); they are the
    caller's to shut down."""
    global _POOL, _SIZE
    pool, size = _POOL, _SIZE
    _POOL, _SIZE = None, 0
    return pool, size
