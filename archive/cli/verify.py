"""``nodekeep verify``."""

from __future__ import annotations

import click

from archive.cli.options import CliState, output_options, pass_state
from archive.cli.output import Bar, emit, human_bytes
from archive.errors import CatalogDamaged, EnvironmentProblem, StorageError


@click.command()
@click.option("--no-rehash", is_flag=True, help="Check presence only, do not re-hash objects.")
@click.option("--delivery", "delivery", default=None, metavar="FILE",
              type=click.Path(exists=True, dir_okay=False),
              help="Check only a delivered file and its .lineage.json manifest (either path) "
                   "against the archive, with the ledger history the delivery was anchored "
                   "on; a file without its manifest is checked from the anchor it states.")
@output_options
@pass_state
def verify(state: CliState, no_rehash: bool, delivery: str | None) -> None:
    """Re-hash every object, walk the ledger chain and check every reference."""
    from archive.store.verify import verify_archive

    if delivery is not None:
        _verify_delivery(state, delivery, rehash=not no_rehash)
        return

    try:
        arc = state.archive()
    except (CatalogDamaged, EnvironmentProblem, StorageError) as exc:
        _unopenable(state, exc)
        return
    report = verify_archive(arc, rehash=not no_rehash, progress=Bar(state))

    def text() -> str:
        lines = [f"checked {report.objects_checked} objects ({human_bytes(report.bytes_checked)}), "
                 f"{report.events_checked} ledger events, {report.rows_checked} catalog rows"]
        for p in report.problems:
            lines.append(f"PROBLEM {p.kind}: {p.subject}: {p.detail}")
        if report.dangling:
            lines.append(f"{len(report.dangling)} unreferenced object(s) (left by interrupted "
                         "writes; not corruption):")
            lines += [f"  {h}" for h in report.dangling[:20]]
        lines.append(f"ledger head {report.head}")
        lines.append("archive OK" if report.ok else f"archive NOT OK: {len(report.problems)} problem(s)")
        return "\n".join(lines)

    emit(state, report.as_dict(), text)
    if not report.ok:
        click.get_current_context().exit(3)


def _unopenable(state: CliState, exc: Exception) -> None:
    """The catalog cannot be opened at all: one finding, with what to do; exit 3 when it is
    damaged, 5 when it is out of reach (server down, disk full)."""
    todo = ("restore the catalog file from a backup (the objects folder is not affected)"
            if isinstance(exc, CatalogDamaged) else getattr(exc, "hint", None))
    detail = f"{exc.args[0]}; {todo}" if todo else str(exc.args[0])
    problem = {"kind": "unreadable-catalog", "subject": "catalog", "detail": detail}
    data = {"ok": False, "problems": [problem], "dangling": [], "objects_checked": 0,
            "bytes_checked": 0, "events_checked": 0, "rows_checked": 0, "head": None}
    emit(state, data, lambda: f"PROBLEM unreadable-catalog: {detail}\n"
                              "archive NOT OK: the catalog could not be opened")
    click.get_current_context().exit(exc.exit_code)  # 3 damaged, 5 out of reach or space


def _verify_delivery(state: CliState, path: str, *, rehash: bool) -> None:
    from archive.lineage.check import check_delivery

    result = check_delivery(state.archive(), path, rehash=rehash)

    def text() -> str:
        lines = [f"delivered file {result.file_path}", f"  SHA-256 {result.file_hash or '-'}",
                 f"manifest {result.manifest_path or '(none: the file checked on its own)'}",
                 f"  SHA-256 {result.manifest_hash or '-'}",
                 f"delivery {result.delivery_id or '-'} of run {result.run_id or '-'}, "
                 f"{result.objects_checked} archive objects checked"]
        a = result.anchor
        lines.append(f"ledger anchor: event {a['anchor']['event']} after "
                     f"{a['anchor']['after'][:16]}…, {a['events_checked']} events checked"
                     if a else "ledger anchor: none (delivered before deliveries were "
                               "anchored)")
        lines += [f"PROBLEM {p.kind}: {p.subject}: {p.detail}" for p in result.problems]
        lines.append("delivery OK" if result.ok
                     else f"delivery NOT OK: {len(result.problems)} problem(s)")
        return "\n".join(lines)

    emit(state, result.as_dict(), text)
    if not result.ok:
        click.get_current_context().exit(3)
