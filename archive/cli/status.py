"""``nodekeep status``: where the survey stands, for the evening loop."""

from __future__ import annotations

import click

from archive.cli.options import CliState, output_options, pass_state, survey_option
from archive.cli.output import emit
from archive.deliver.changes import DEFAULT_SHIFT


@click.command()
@click.option("--shift", type=click.FloatRange(min=0), default=DEFAULT_SHIFT, show_default=True,
              metavar="METRES",
              help="Of the delivered positions that moved since the last delivery, count "
                   "apart those that moved more than this.")
@survey_option
@output_options
@pass_state
def status(state: CliState, shift: float, survey_name: str | None) -> None:
    """Where the survey stands: logs, nodes and fixes loaded and the newest input versions;
    deployments awaiting harvest and logged nodes without a deployment; the newest run and
    whether its inputs changed since; stations waiting for review by flag; what changed
    since the last delivery. Counts come from the catalog; no fix table is read."""
    from archive.lineage.status import status_text, survey_status

    arc = state.archive()
    st = survey_status(arc, state.survey_id(survey_name), shift=shift)
    emit(state, st.as_dict(), lambda: status_text(st))
