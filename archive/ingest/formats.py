"""The fix-log formats: name -> how one raw log file becomes fixes.

Each format registers a parse function ``(data: bytes, options: LogOptions) -> ParseResult``
(every line accounted for as accepted, rejected or ignored; bad content becomes rejects,
never an exception), the parser id recorded with each raw file (bump its version when the
output changes), whether it needs a column profile, whether large files go through the
streaming NMEA reader, and what a log of the format holds (for the message when a file
yields no fix). ``nodekeep load fixes --format`` offers every registered name, and
:func:`archive.ingest.load.load_fix_files` accepts it; docs/maintainer-guide.md has the recipe.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

from archive.registry import Registry

if TYPE_CHECKING:
    from archive.ingest.result import ParseResult


@dataclass(frozen=True)
class LogOptions:
    """What a parse function knows besides the bytes: the node, the raw file's hash (copied
    into every fix), the date for logs without one, the window the log is expected in (the
    node's deployments, for GPS week rollovers; ``reference_text`` names it) and the column
    profile of formats that need one."""

    node: str
    raw_hash: str
    date: dt.date | None = None
    reference: tuple[dt.datetime, dt.datetime] | None = None
    reference_text: str = "the survey"
    profile_path: str | None = None


@dataclass(frozen=True)
class LogFormat:
    """How one fix-log format is read."""

    parse: str | Callable[[bytes, LogOptions], ParseResult]  # or "module:function"
    parser: str  # recorded with each raw file, e.g. "nmea-2"
    expected: str  # what a log of this format holds (message when a file yields no fix)
    no_fix: str = "no line gave a fix"  # the problem, when a file yields no fix
    hint: str = ""  # what to try when a file yields no fix
    needs_profile: bool = False
    streams: bool = False  # large files are parsed by the streaming NMEA reader

    def parse_function(self) -> Callable[[bytes, LogOptions], Any]:
        """The parse function (imported on first use when given as ``module:function``)."""
        if isinstance(self.parse, str):
            import importlib

            module, _, attr = self.parse.partition(":")
            return getattr(importlib.import_module(module), attr)
        return self.parse


LOG_FORMATS: Registry[LogFormat] = Registry("log format")
LOG_FORMATS.register(
    "nmea", "NMEA 0183 sentences (GGA, GNS, RMC, GLL with GSA, ZDA), any talker",
    LogFormat(parse="archive.ingest.nmea:parse_log", parser="nmea-2", streams=True,
              expected="$--GGA, $--GNS, $--RMC or $--GLL sentences",
              no_fix="no usable position sentence: not an NMEA 0183 fix log",
              hint="for CSV/TSV logs use --format delimited --profile FILE"))
LOG_FORMATS.register(
    "delimited", "CSV or TSV text read with a column profile (--profile)",
    LogFormat(parse="archive.ingest.delimited:parse_log", parser="delimited-2",
              needs_profile=True, expected="lines the column profile can read",
              no_fix="no line could be read with the delimited profile",
              hint="check the profile's column names, delimiter and formats"))


def log_format(name: str) -> LogFormat:
    """The registered format ``name`` (UsageError naming the known formats otherwise)."""
    return LOG_FORMATS.get(name)
