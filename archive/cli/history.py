"""``nodekeep history``: the ledger, newest first."""

from __future__ import annotations

import json

import click

from archive.cli.options import CliState, output_options, pass_state
from archive.cli.output import emit, table


@click.command()
@click.option("--limit", "-n", default=20, show_default=True, type=click.IntRange(min=0),
              help="How many events (0: all).")
@click.option("--head", "head_only", is_flag=True,
              help="Print only the ledger head hash (record it outside the archive).")
@output_options
@pass_state
def history(state: CliState, limit: int, head_only: bool) -> None:
    """Show the ledger of state changes, newest first: who acted (the declared actor, and on
    PostgreSQL the database user the server saw), what and the event hash."""
    from archive.store.history import ledger_events, ledger_head

    arc = state.archive()
    if head_only:
        h = ledger_head(arc)
        emit(state, h, lambda: f"{h['hash']}  (event {h['seq']}, {h['at']})")
        return
    events = ledger_events(arc, limit=limit or None)
    emit(state, events, lambda: table(
        [(e["seq"], e["at"].strftime("%Y-%m-%d %H:%M:%S"), e["actor"], e["db_user"] or "-",
          e["action"], _summary(e), e["hash"][:12]) for e in events],
        ["seq", "UTC", "actor", "db user", "action", "what", "hash"]))


def _summary(event: dict) -> str:
    payload = event["payload"]
    if payload is None:
        return f"(left out of this bundle; sha256 {event['payload_digest'][:12]}...)"
    items = {k: v for k, v in payload.items() if k != "rows"}
    text = json.dumps(items, separators=(",", ":"), default=str)
    return text if len(text) <= 60 else text[:57] + "..."
