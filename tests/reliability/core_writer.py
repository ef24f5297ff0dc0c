"""A writer on the archive core alone, for fault injection: ``python -m
tests.reliability.core_writer ARCHIVE COUNT [SIZE]``.

It stores COUNT deterministic objects of SIZE bytes, each followed by one transaction that
registers it, adds a raw-file row and appends a ledger event (the custody write pattern),
and skips what an earlier, interrupted run already committed, so running it again after a
crash completes the same work. ``--fail-after K`` raises after K writes (a clean failure).
"""

from __future__ import annotations

import argparse
import hashlib

from sqlalchemy import select

from archive.store.archive import Archive
from archive.store.models import RawFile, utcnow

ACTION = "reliability.write"


def content(i: int, size: int) -> bytes:
    """Deterministic bytes of object ``i`` (a SHA-256 counter stream)."""
    seed = hashlib.sha256(f"kestrel-{i}".encode()).digest()
    blocks = (size + 31) // 32
    return b"".join(hashlib.sha256(seed + k.to_bytes(4, "big")).digest()
                    for k in range(blocks))[:size]


def write(root: str, count: int, size: int, tag: str = "W") -> int:
    """Store and commit what is missing; returns how many writes were made."""
    made = 0
    with Archive.open(root) as arc:
        with arc.session() as s:
            survey = arc.survey(s)
            done = set(s.scalars(select(RawFile.object_hash)
                                 .where(RawFile.survey_id == survey.id)))
        for i in range(count):
            data = content(i, size)
            h = hashlib.sha256(data).hexdigest()
            if h in done:
                continue
            h, n = arc.objects.put_bytes(data)
            with arc.transaction() as tx:
                arc.register_object(tx, h, n, "raw")
                row = RawFile(
                    survey_id=survey.id, object_hash=h, original_name=f"{tag}{i:04d}.bin",
                    node=f"{tag}{i:04d}", format="bytes", size=n, received_at=utcnow(),
                    received_by=arc.actor, parser="reliability", n_lines=0, n_accepted=0,
                    n_rejected=0, n_ignored=0, n_fixes=0, n_valid=0, details="{}",
                )
                tx.add(row)
                arc.log(tx, ACTION, {"object": h, "i": i}, survey_id=survey.id, rows=[row])
            made += 1
    return made


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__)
    p.add_argument("archive")
    p.add_argument("count", type=int)
    p.add_argument("size", type=int, nargs="?", default=200_000)
    p.add_argument("--tag", default="W")
    args = p.parse_args()
    write(args.archive, args.count, args.size, args.tag)


if __name__ == "__main__":
    main()
