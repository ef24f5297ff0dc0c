"""Generate the command reference (docs/cli.md) from the commands' own help text.

Run ``python -m archive.cli.docgen > docs/cli.md``; ``tests/test_docs.py`` fails when the
page is out of date, so the reference can never drift from the code.
"""

from __future__ import annotations

import click

from archive.cli.main import cli


def _walk(cmd: click.Command, path: list[str], ctx: click.Context):
    yield path, cmd, ctx
    if isinstance(cmd, click.Group):
        for name in cmd.list_commands(ctx):
            sub = cmd.get_command(ctx, name)
            if sub is None or sub.hidden:
                continue
            sub_ctx = click.Context(sub, info_name=name, parent=ctx)
            yield from _walk(sub, [*path, name], sub_ctx)


def command_paths() -> list[str]:
    """Every command path, e.g. 'nodekeep load fixes'."""
    root = click.Context(cli, info_name="nodekeep", terminal_width=88, max_content_width=88,
                         **cli.context_settings)
    return [" ".join(["nodekeep", *p]) for p, _c, _x in _walk(cli, [], root)]


def render() -> str:
    """The whole reference as Markdown."""
    out = ["# Command reference", "",
           "Generated from the commands' help (`python -m archive.cli.docgen > docs/cli.md`).", ""]
    root = click.Context(cli, info_name="nodekeep", terminal_width=88, max_content_width=88,
                         **cli.context_settings)
    for path, cmd, ctx in _walk(cli, [], root):
        title = " ".join(["nodekeep", *path])
        out += [f"## {title}", "", "```text", cmd.get_help(ctx).rstrip(), "```", ""]
    return "\n".join(out)


if __name__ == "__main__":
    click.echo(render(), nl=False)
