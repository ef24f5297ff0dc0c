"""Damage a node log the way a failing logger or a bad card does.

Three kinds, each counted so tests and the demo can check that the reader accounts for them:
sentences whose text no longer matches their checksum (a flipped character), a block of
binary junk (power loss while writing), and truncated sentences (one cut mid-file where the
logger restarted, and the last one cut short at the end of the file).
"""

from __future__ import annotations

import numpy as np


def damage_log(data: bytes, rng: np.random.Generator, *, n_checksum: int = 5,
               junk_bytes: int = 256) -> tuple[bytes, dict[str, int]]:
    """Return damaged bytes and counts {bad_checksums, junk_bytes, truncated_lines}."""
    buf = np.frombuffer(data, dtype=np.uint8)
    starts = np.flatnonzero(buf == ord("$"))
    if starts.size < 100:
        raise ValueError("log too short to damage")
    ends = np.flatnonzero(buf == ord("\n"))
    out = bytearray(data)

    # flip one digit of the time field in a few GGA sentences of the first half
    first = starts[10: starts.size // 2]
    gga = first[(buf[first + 3] == ord("G")) & (buf[first + 4] == ord("G"))
                & (buf[first + 5] == ord("A"))]
    picks = rng.choice(gga, size=n_checksum, replace=False)
    for s in np.sort(picks):
        pos = int(s) + 8  # second digit of hhmmss (after "$GPGGA,h")
        out[pos] = ord("0") + (out[pos] - ord("0") + 1 + int(rng.integers(0, 8))) % 10

    # cut a sentence short in the third quarter: its tail is lost, the next line follows
    cut_line = int(rng.integers(starts.size // 2, 3 * starts.size // 4))
    a = int(starts[cut_line])
    b = int(ends[np.searchsorted(ends, a)])  # its own newline
    keep = a + int(rng.integers(12, 30))
    out[keep:b - 1] = b""  # keeps the CR LF, drops the rest of the sentence

    # binary junk at a line start in the last quarter
    buf2 = np.frombuffer(bytes(out), dtype=np.uint8)
    starts2 = np.flatnonzero(buf2 == ord("$"))
    at = int(starts2[int(rng.integers(3 * starts2.size // 4, starts2.size - 10))])
    junk = rng.integers(0, 256, size=junk_bytes, dtype=np.uint8)
    junk[junk == ord("$")] = 0  # no sentence start inside the junk
    out[at:at] = junk.tobytes() + b"\r\n"

    # the last sentence cut short, as when the battery dies mid-write
    last = out.rfind(b"$")
    del out[last + int(rng.integers(15, 40)):]
    return bytes(out), {"bad_checksums": n_checksum, "junk_bytes": junk_bytes,
                        "truncated_lines": 2}
