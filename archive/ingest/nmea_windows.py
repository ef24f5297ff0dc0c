"""A log cut into windows of bytes that can be scanned on their own.

A log is cut into windows of a few megabytes at *safe* line ends: after a line without a
sentence start, or before a line holding one. A sentence broken over two lines by a stray
line end always starts with '$' and its second line never holds one, so no window
separates the two. Windows come from blocks of bytes, from a file (read straight into
their buffers, optionally by a thread of their own ahead of the caller) or from memory.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator

import numpy as np

MAX_PENDING = 64 << 20  # bytes without a safe line end after which one is forced


def _line_end_before(data: bytes, hi: int, lo: int) -> int:
    """Index of the last CR or LF in ``data[lo:hi]`` (-1 if none)."""
    return max(data.rfind(b"\n", lo, hi), data.rfind(b"\r", lo, hi))


def _line_end_after(data: bytes, lo: int) -> int:
    """Index of the first CR or LF in ``data[lo:]`` (``len(data)`` if none)."""
    ends = [i for i in (data.find(b"\n", lo), data.find(b"\r", lo)) if i >= 0]
    return min(ends) if ends else len(data)


def safe_cut(data: bytes, lo: int = 0, hi: int | None = None, tries: int = 1000) -> int:
    """The largest safe cut in ``(lo, hi]`` of ``data`` (see the module docstring): a
    position just after a line end, not between a CR and its LF, where the line before
    holds no '$' or the line after does. -1 when there is none within ``tries`` lines."""
    n = len(data)
    end = n if hi is None else min(hi, n)
    for _ in range(tries):
        c = _line_end_before(data, end, lo)
        if c < 0:
            return -1
        if data[c] == 13 and (c + 1 >= n or data[c + 1] == 10):
            end = c  # half a CR LF, or a CR LF going past the limit
            continue
        cut = c + 1
        if cut <= lo:
            return -1
        start_of = c - 1 if data[c] == 10 and c > lo and data[c - 1] == 13 else c
        prev = _line_end_before(data, start_of, lo)
        before = data[(prev + 1 if prev >= 0 else lo):start_of]
        after = data[cut:_line_end_after(data, cut)]
        if b"$" not in before or b"$" in after:
            return cut
        end = start_of
    return -1


def windows_from_blocks(blocks: Iterable[bytes]) -> Iterator[tuple[bytes, bool]]:
    """Windows ``(bytes, final)`` of a log given as consecutive blocks: each block with
    what was left of the one before, up to its last safe cut."""
    pending = b""
    it = iter(blocks)
    block = next(it, None)
    while block is not None:
        nxt = next(it, None)
        data = pending + block if pending else block
        if nxt is None:
            yield data, True
            return
        cut = safe_cut(data)
        if cut < 0 and len(data) > MAX_PENDING:
            cut = _line_end_before(data, len(data) - 1, 0) + 1
        if cut <= 0:
            pending = data
        else:
            yield memoryview(data)[:cut], False
            pending = data[cut:]
        block = nxt


def read_ahead(windows: Iterator[tuple[memoryview, bool]], depth: int = 2
               ) -> Iterator[tuple[memoryview, bool]]:
    """The same windows, read by a thread of their own up to ``depth`` ahead of the
    caller (reading a window is mostly a copy that releases the interpreter lock; the
    thread that assembles chunks no longer waits for it). An error of the reading is
    raised here, in order; closing this generator stops the thread."""
    import queue
    import threading

    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()
    end = object()

    def put(item) -> bool:
        while not stop.is_set():
            try:
                q.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def run() -> None:
        try:
            for w in windows:
                if not put(w):
                    return
            put(end)
        except BaseException as exc:  # noqa: BLE001 - raised in the consumer
            put(exc)
        finally:
            close = getattr(windows, "close", None)
            if close is not None:
                close()  # the file, when the caller stopped early

    thread = threading.Thread(target=run, name="nmea-read", daemon=True)
    thread.start()
    try:
        while (item := q.get()) is not end:
            if isinstance(item, BaseException):
                raise item
            yield item
    finally:
        stop.set()
        thread.join()


def file_windows(path, size: int) -> Iterator[tuple[memoryview, bool]]:
    """Windows of about ``size`` bytes of a file, read straight into their buffers (only
    the bytes after the last safe cut are copied into the next)."""
    with open(path, "rb", buffering=0) as fh:
        pending = b""
        yielded = False
        while True:
            buf = bytearray(len(pending) + size)
            buf[:len(pending)] = pending
            total = len(pending)
            view = memoryview(buf)
            while total < len(buf):
                k = fh.readinto(view[total:])
                if not k:
                    break
                total += k
            if total < len(buf):  # end of file
                if total or not yielded:
                    yield view[:total], True
                return
            cut = safe_cut(buf, 0, total)
            if cut < 0 and total > MAX_PENDING:
                cut = _line_end_before(buf, total - 1, 0) + 1
            if cut <= 0:
                pending = bytes(buf)
                continue
            yield view[:cut], False
            yielded = True
            pending = bytes(view[cut:total])


def windows_from_memory(data: bytes | np.ndarray, size: int) -> Iterator[tuple[memoryview, bool]]:
    """Windows of about ``size`` bytes of a log held in memory (views, no copy)."""
    raw = data.tobytes() if isinstance(data, np.ndarray) else data
    view = memoryview(raw)
    n = len(raw)
    start = 0
    while start < n:
        hi = start + size
        cut = -1
        while hi < n:
            cut = safe_cut(raw, start, hi)
            if cut > start:
                break
            hi += size
        if hi >= n or cut <= start:
            yield view[start:], True
            return
        yield view[start:cut], False
        start = cut
    if n == 0:
        yield view, True
