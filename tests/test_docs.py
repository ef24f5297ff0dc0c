"""Docs that check themselves: the command reference is current and complete."""

from __future__ import annotations

from pathlib import Path

from archive.cli.docgen import command_paths, render

DOCS = Path(__file__).resolve().parents[1] / "docs"
README = Path(__file__).resolve().parents[1] / "README.md"


def test_cli_reference_is_current():
    assert (DOCS / "cli.md").read_text(encoding="utf-8") == render(), (
        "docs/cli.md is out of date: run 'python -m archive.cli.docgen > docs/cli.md'")


def test_every_command_is_documented_in_reference():
    text = (DOCS / "cli.md").read_text(encoding="utf-8")
    for path in command_paths():
        assert f"## {path}\n" in text, path


def test_readme_states_job_quick_start_and_cautions():
    text = README.read_text(encoding="utf-8")
    first_paragraph = text.split("\n\n")[1]
    assert "data manager" in first_paragraph and "deliver" in first_paragraph
    assert "make demo" in text and "make test" in text
    assert "not a certified or legal survey" in text
    assert "licensed surveyor" in text


def test_docs_links_resolve():
    import re

    for page in [README, *DOCS.glob("*.md")]:
        for target in re.findall(r"\]\(([^)#:]+\.md)\)", page.read_text(encoding="utf-8")):
            assert (page.parent / target).is_file(), f"{page.name} links to missing {target}"


def test_help_does_not_import_heavy_libraries():
    """`nodekeep --help` lists every command without importing the numeric stack, so it
    answers at once (commands import what they need when they run)."""
    import subprocess
    import sys

    code = ("import sys, click; from archive.cli.main import cli; ctx = click.Context(cli); "
            "[cli.get_command(ctx, n) for n in cli.list_commands(ctx)]; "
            "print(sorted(m for m in ('numpy', 'pandas', 'pyarrow', 'sqlalchemy', 'matplotlib') "
            "if m in sys.modules))")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "[]"


def test_every_command_has_json_and_quiet():
    import click

    from archive.cli.docgen import _walk
    from archive.cli.main import cli

    root = click.Context(cli, info_name="nodekeep")
    for path, cmd, _ctx in _walk(cli, [], root):
        if isinstance(cmd, click.Group):
            continue
        opts = {o for p in cmd.params for o in p.opts}
        assert {"--json", "--quiet"} <= opts, " ".join(path)
