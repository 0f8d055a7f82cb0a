"""CLI commands and the schema guard: db upgrade, refusal of an unmigrated database, users, keys,
re-analysis; migrations on PostgreSQL when HALFWATCH_TEST_POSTGRES_URL is set."""

from __future__ import annotations

import datetime as dt

import pytest
from sqlalchemy import func, inspect, select
from support.plant import make_plant
from support.signals import tone_record

from server.cli import main
from server.migrations import current_revisions, head_revisions, upgrade
from server.services.ingest import ingest_record
from server.storage import Database, SchemaNotReady
from server.storage.tables import ApiKey, Job, User


@pytest.fixture
def cli_env(tmp_path, monkeypatch):
    monkeypatch.setenv("HALFWATCH_DATA_DIR", str(tmp_path / "data"))
    monkeypatch.setenv("HALFWATCH_ARGON2_TIME_COST", "1")
    monkeypatch.setenv("HALFWATCH_ARGON2_MEMORY_COST_KIB", "1024")
    monkeypatch.setenv("HALFWATCH_ARGON2_PARALLELISM", "1")
    return f"sqlite:///{(tmp_path / 'data' / 'halfwatch.db').as_posix()}"


def test_unmigrated_database_is_refused_with_the_fix(cli_env, capsys):
    from server.app import create_app
    from server.settings import Settings

    with pytest.raises(SchemaNotReady, match="halfwatch db upgrade"):
        create_app(Settings())
    assert main(["worker", "--max-jobs", "1"]) == 2
    assert "halfwatch db upgrade" in capsys.readouterr().err
    assert main(["db", "upgrade"]) == 0
    assert current_revisions(cli_env) == head_revisions()
    assert "0001" in current_revisions(cli_env) or any(
        r.startswith("00") for r in current_revisions(cli_env))
    create_app(Settings())  # now it starts
    assert main(["db", "upgrade"]) == 0  # and upgrading twice is harmless


def test_database_behind_the_code_is_refused(cli_env):
    upgrade(cli_env, "0001")
    db = Database(cli_env)
    try:
        if head_revisions() != {"0001"}:
            with pytest.raises(SchemaNotReady, match="halfwatch db upgrade"):
                db.check_schema()
        else:
            db.check_schema()
    finally:
        db.dispose()


def test_user_add_apikey_create_and_reanalyze(cli_env, capsys, rng):
    assert main(["db", "upgrade"]) == 0
    assert main(["user", "add", "rita", "--role", "engineer", "--password", "long enough"]) == 0
    assert main(["user", "add", "rita", "--password", "long enough"]) == 2  # exists
    assert main(["user", "add", "sam", "--password", "short"]) == 2
    db = Database(cli_env)
    try:
        plant = make_plant(db)
        capsys.readouterr()
        assert main(["apikey", "create", "gateway 4", "--site", "Riverside works"]) == 0
        key = capsys.readouterr().out.strip().splitlines()[-1]
        assert key.startswith("hwk_")
        assert main(["apikey", "create", "x", "--site", "Nowhere"]) == 2
        with db.read() as s:
            assert s.scalar(select(User.role).where(User.username == "rita")) == "engineer"
            k = s.scalar(select(ApiKey))
            assert k.site_id == plant.site_id and key not in k.key_hash
        t = dt.datetime(2026, 3, 2, tzinfo=dt.UTC)
        for i in range(3):
            ingest_record(db, point_id=plant.point_id, samples=tone_record(rng, n=2048), fs_hz=2560.0,
                          units="g", measured_at=t + dt.timedelta(days=i), origin="api", uploader="t")
        with db.unit_of_work() as s:
            s.execute(Job.__table__.update().values(state="done"))
        assert main(["reanalyze", "--since", "2026-03-03"]) == 0
        assert "2 record(s)" in capsys.readouterr().out
        assert main(["reanalyze", "--since", "last tuesday"]) == 2
        with db.read() as s:
            assert s.scalar(select(func.count()).select_from(Job).where(Job.reason == "reanalyze")) == 2
    finally:
        db.dispose()


def test_migrations_on_postgresql(pg_settings):
    url = pg_settings.database_url
    upgrade(url)
    assert current_revisions(url) == head_revisions()
    db = Database(url)
    try:
        db.check_schema()
        with db.read() as s:
            names = set(inspect(s.connection()).get_table_names())
        assert {"records", "jobs", "results", "waveforms", "users", "api_keys"} <= names
    finally:
        db.dispose()


def _options(parser, path=()):
    """(command path, option or argument, help) for every argument of every (sub)command."""
    import argparse

    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for name, sub in action.choices.items():
                yield from _options(sub, (*path, name))
        elif not isinstance(action, argparse._HelpAction):
            yield " ".join(path), "/".join(action.option_strings) or action.dest, action.help


def test_every_command_option_has_help_and_commands_are_listed_by_job(capsys):
    """A newcomer reads `halfwatch --help` and `halfwatch CMD --help` (issue: help on every option, commands
    grouped by job; common practice for command-line tools)."""
    import argparse

    from server.cli import JOBS, build_parser

    parser = build_parser()
    bare = [(cmd, opt) for cmd, opt, text in _options(parser) if not text or not text.strip()]
    assert not bare, f"options without help text: {bare}"
    commands = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices
    text = parser.format_help()
    listed = [line.split()[0] for line in text.split("commands:", 1)[1].splitlines()
              if line.startswith("    ") and line.split()]
    assert sorted(listed) == sorted(commands), "each command exactly once in the grouped list"
    assert [t for t, _ in JOBS] == [t for t, _ in JOBS if f"  {t}:" in text]  # every job heading shown
    assert "other:" not in text  # every command has a job
