"""Which files a load names, and the node serial of each (no heavy imports here: the
command line uses it before anything else is loaded)."""

from __future__ import annotations

import glob
import re
from pathlib import Path

from archive.errors import UsageError


def expand_paths(paths: list[str | Path]) -> list[Path]:
    """Files named, files under folders (recursively, hidden ones skipped) and glob matches,
    in a stable order without repeats. A name that matches nothing is a usage error."""
    out: list[Path] = []
    for p in paths:
        p = Path(p)
        if p.is_dir():
            found = sorted(x for x in p.rglob("*") if x.is_file()
                           and not any(part.startswith(".") for part in x.relative_to(p).parts))
        elif p.is_file():
            found = [p]
        else:
            found = sorted(Path(x) for x in glob.glob(str(p), recursive=True) if Path(x).is_file())
        if not found:
            raise UsageError(f"{p}: no such file, folder or matching file",
                             hint="check the path or quote the glob pattern")
        out.extend(found)
    seen: set[Path] = set()
    unique = []
    for f in out:
        key = f.resolve()
        if key not in seen:
            seen.add(key)
            unique.append(f)
    return unique


def node_for(path: Path, node: str | None, pattern: re.Pattern[str] | None) -> str:
    """The node serial of a file: ``node``, else the pattern's ``node`` group (or first group,
    or whole match) searched in the file name, else the file stem."""
    if node:
        return node
    if pattern is None:
        return path.stem
    m = pattern.search(path.name)
    if not m:
        raise UsageError(f"{path}: the node pattern {pattern.pattern!r} does not match the "
                         "file name", hint="fix --node-pattern or give --node")
    if "node" in pattern.groupindex:
        return m.group("node")
    return m.group(1) if pattern.groups else m.group(0)
