"""Command line of the archive core: init, survey, history, verify, upgrade, errors."""

from __future__ import annotations

import json
import os

from sqlalchemy import text
from sqlalchemy.engine import make_url

from archive.cli.main import cli
from archive.store.archive import Archive
from tests.support.cli import invoke


def test_init_survey_history_verify(tmp_path, runner):
    root = tmp_path / "arc"
    r = runner.invoke(cli, ["init", str(root)])
    assert r.exit_code == 0, r.output
    assert f"created archive {root}" in r.output
    r = invoke(runner, root, "survey", "create", "Kestrel Flats 3D", "--crs", "EPSG:32614",
               "--client", "Harrow Basin Energy")
    assert r.exit_code == 0
    assert "EPSG:32614 (WGS 84 / UTM zone 14N, metre)" in r.output
    r = invoke(runner, root, "survey", "list", "--json")
    data = json.loads(r.output)
    assert data[0]["name"] == "Kestrel Flats 3D" and data[0]["unit"] == "metre"
    r = invoke(runner, root, "history", "--json")
    events = json.loads(r.output)
    assert [e["action"] for e in events] == ["survey.create", "archive.init"]
    assert events[0]["prev_hash"] == events[1]["hash"]
    r = invoke(runner, root, "history", "--head")
    assert r.output.startswith(events[0]["hash"])
    r = invoke(runner, root, "verify")
    assert r.exit_code == 0 and "archive OK" in r.output


def test_verify_exit_code_and_message_on_tamper(tmp_path, runner, survey_arc):
    with survey_arc.engine.connect() as c, c.begin():
        c.execute(text("UPDATE surveys SET client = 'someone else'"))
    r = invoke(runner, survey_arc.root, "verify")
    assert r.exit_code == 3
    assert "PROBLEM altered-row: surveys row 1" in r.output
    r = invoke(runner, survey_arc.root, "verify", "--json")
    assert json.loads(r.output)["problems"][0]["kind"] == "altered-row"


def test_errors_are_one_line_with_exit_codes(tmp_path, runner, survey_arc, monkeypatch):
    monkeypatch.delenv("NODEKEEP_ARCHIVE", raising=False)
    monkeypatch.chdir(tmp_path)
    r = runner.invoke(cli, ["survey", "list"])
    assert r.exit_code == 1
    assert r.output.strip().startswith("error: no nodekeep archive found")
    assert "nodekeep init" in r.output
    assert "Traceback" not in r.output
    r = invoke(runner, survey_arc.root, "survey", "create", "Geo", "--crs", "EPSG:4326")
    assert r.exit_code == 1 and "is geographic, not a projected CRS" in r.output
    r = invoke(runner, survey_arc.root, "survey", "create", "Other", "--crs", "UTM14")
    assert r.exit_code == 1 and "is not an EPSG code" in r.output
    r = runner.invoke(cli, ["init", str(survey_arc.root)])
    assert r.exit_code == 2 and "already holds a nodekeep archive" in r.output


def test_schema_behind_tells_to_upgrade(runner, arc):
    with arc.engine.connect() as c, c.begin():
        c.execute(text("DELETE FROM alembic_version"))
    r = invoke(runner, arc.root, "survey", "list")
    assert r.exit_code == 1
    assert "schema revision none, this nodekeep needs" in r.output
    assert "run 'nodekeep upgrade'" in r.output


def test_upgrade_on_current_archive_is_a_no_op(runner, arc):
    r = invoke(runner, arc.root, "upgrade", "--json")
    assert r.exit_code == 0
    assert json.loads(r.output)["changed"] is False


def test_actor_from_option_and_env(tmp_path, runner, monkeypatch):
    root = tmp_path / "arc"
    monkeypatch.setenv("NODEKEEP_ACTOR", "data.manager")
    runner.invoke(cli, ["init", str(root)])
    runner.invoke(cli, ["-A", str(root), "--actor", "qc.rep", "survey", "create", "K",
                        "--crs", "EPSG:32614"])
    r = invoke(runner, root, "history", "--json")
    actors = [e["actor"] for e in json.loads(r.output)]
    assert actors == ["qc.rep", "data.manager"]
    assert os.environ["NODEKEEP_ACTOR"] == "data.manager"


def test_postgres_url_password_is_never_printed(tmp_path, runner, pg_url):
    from sqlalchemy.engine import make_url

    url = make_url(pg_url).set(password="s3cret-pw").render_as_string(hide_password=False)
    r = runner.invoke(cli, ["init", str(tmp_path / "arc"), "--db", url])
    assert "s3cret-pw" not in r.output
    if r.exit_code == 0:  # trust auth ignores the password
        arc = Archive.open(tmp_path / "arc")
        assert "s3cret-pw" not in json.dumps(arc.describe())
        arc.close()


def test_history_limit_must_not_be_negative(runner, arc):
    r = invoke(runner, arc.root, "history", "--limit", "-3")
    assert r.exit_code == 2 and "-3 is not in the range x>=0" in r.output


def test_history_shows_the_declared_actor_and_the_database_user(tmp_path, runner, db_url):
    """On PostgreSQL every event records the session user the server saw beside the actor
    the command declared; SQLite has no server login, so there is none."""
    root = tmp_path / "arc"
    args = ["init", str(root)] + (["--db", db_url] if db_url else [])
    assert runner.invoke(cli, args).exit_code == 0
    r = runner.invoke(cli, ["-A", str(root), "--actor", "crew 7 party chief", "survey",
                            "create", "Kestrel Flats 3D", "--crs", "EPSG:32614"])
    assert r.exit_code == 0, r.output
    events = json.loads(invoke(runner, root, "history", "--json").output)
    login = make_url(db_url).username if db_url else None
    assert events[0]["actor"] == "crew 7 party chief" and events[0]["db_user"] == login
    assert all(e["db_user"] == login for e in events)
    text_out = invoke(runner, root, "history").output
    header, _rule, row = text_out.splitlines()[:3]
    assert "actor" in header and "db user" in header
    assert "crew 7 party chief" in row and (login or "-") in row.split()


FREEZE_PROBE = """
import atexit, gc, sys
atexit.register(lambda: sys.stderr.write(f"frozen={gc.get_freeze_count()}\\n"))
from archive.cli.main import main
main(sys.argv[1:])
"""


def test_a_one_command_process_hides_its_modules_from_the_collector(tmp_path, runner,
                                                                    survey_arc):
    """The console entry point freezes what is loaded once the archive is open (the
    collector's walks, the one at exit included, skip it); a command run inside a longer
    process (here, the test's) leaves the collector alone."""
    import gc
    import subprocess
    import sys

    done = subprocess.run([sys.executable, "-c", FREEZE_PROBE, "-A", str(survey_arc.root),
                           "survey", "list"], capture_output=True, text=True, check=True)
    frozen = int(done.stderr.strip().rsplit("frozen=", 1)[1])
    assert frozen > 10_000  # SQLAlchemy, pyarrow and numpy alone hold far more objects
    before = gc.get_freeze_count()
    r = invoke(runner, survey_arc.root, "survey", "list")
    assert r.exit_code == 0, r.output
    assert gc.get_freeze_count() == before
    # the entry point called inside this process: once it returns, later commands freeze
    # nothing of the caller's (the frozen modules stay frozen, harmlessly)
    import pytest

    from archive.cli.main import main

    gc.unfreeze()
    with pytest.raises(SystemExit):
        main(["-A", str(survey_arc.root), "survey", "list"])
    gc.unfreeze()
    r = invoke(runner, survey_arc.root, "survey", "list")
    assert r.exit_code == 0, r.output
    assert gc.get_freeze_count() == 0
