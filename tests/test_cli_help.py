"""A command line a person can guess: every option of every command says what it does, every
command that talks to a model uses the default model without --model, and the API is found
where `serve` said it would be."""

from __future__ import annotations

import argparse
import os
from pathlib import Path

import pytest

from service import cli
from service.address import ServeAddress, read_address, remove_address, write_address


def _commands() -> dict[str, argparse.ArgumentParser]:
    """Every (sub)command's parser by its full name: 'route', 'models create', ..."""
    found: dict[str, argparse.ArgumentParser] = {}

    def walk(parser: argparse.ArgumentParser, prefix: str) -> None:
        for action in parser._actions:
            if isinstance(action, argparse._SubParsersAction):
                for name, child in action.choices.items():
                    full = f"{prefix} {name}".strip()
                    found[full] = child
                    walk(child, full)

    walk(cli.build_parser(), "")
    return found


COMMANDS = _commands()


@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_every_option_has_a_description(command: str, capsys) -> None:
    parser = COMMANDS[command]
    undescribed = [
        "/".join(action.option_strings) or action.dest
        for action in parser._actions
        if not isinstance(action, argparse._SubParsersAction)
        and (action.help is None or not action.help.strip())
    ]
    assert undescribed == [], f"`mixroute {command}`: options without help: {undescribed}"
    # and the help page itself renders (argparse formats help strings with %)
    with pytest.raises(SystemExit) as stop:
        cli.main([*command.split(), "--help"])
    assert stop.value.code == 0
    assert "usage: mixroute" in capsys.readouterr().out


def test_the_command_list_covers_what_the_api_offers() -> None:
    for command in ("label", "flagged", "snapshot", "rollback", "drift", "feed", "describe"):
        assert command in COMMANDS


class _AskedError(Exception):
    """Raised by the stand-in client at its first request: the path it was asked for."""


# Commands that take --model and talk to the API, with the rest of their arguments.
MODEL_COMMANDS = {
    "route": ["route", "{docs}"],
    "describe": ["describe"],
    "feed": ["feed", "{docs}"],
    "snapshot": ["snapshot", "list"],
    "rollback": ["rollback", "s-1"],
    "drift": ["drift"],
    "label": ["label", "0", "--label", "lost property"],
    "flagged": ["flagged"],
    "correct": ["correct", "--id", "m-1", "--group", "0"],
    "examples": ["examples", "0", "a lost bag on the morning crossing"],
    "export": ["export"],
    "events": ["events"],
}


def test_every_model_command_is_listed_here() -> None:
    # `work --model` is not an API command: without it the worker learns every model.
    # `intake` talks to Redis and the mailbox, not to the API; its default model is
    # service.intake_command's (--model, else MIXROUTE_INTAKE_MODEL, else the default model).
    takes_model = {
        name
        for name, parser in COMMANDS.items()
        if any("--model" in action.option_strings for action in parser._actions)
    }
    assert takes_model == set(MODEL_COMMANDS) | {"work", "intake"}


@pytest.mark.parametrize("command", sorted(MODEL_COMMANDS))
def test_the_default_model_without_model_option(
    command: str, tmp_path: Path, monkeypatch, capsys
) -> None:
    docs = tmp_path / "docs.jsonl"
    docs.write_text('{"id": "1", "text": "the ferry left without my bicycle"}\n')
    monkeypatch.setenv("MIXROUTE_DEFAULT_MODEL", "island-inbox")
    asked: list[str] = []

    def first_request(self: cli.ApiClient, method: str, path: str, **kwargs: object) -> object:
        asked.append(path)
        raise _AskedError(path)

    monkeypatch.setattr(cli.ApiClient, "request", first_request)
    argv = [arg.format(docs=docs) for arg in MODEL_COMMANDS[command]]
    with pytest.raises(_AskedError):
        cli.main([*argv, "--api", "http://127.0.0.1:9"])
    assert asked and asked[0].startswith("/models/island-inbox/"), asked


def test_route_has_one_meaning_per_argument(tmp_path: Path, monkeypatch, capsys) -> None:
    # The model file goes behind --model-file; mixing it with an API model is refused.
    docs = tmp_path / "docs.jsonl"
    docs.write_text('{"id": "1", "text": "ferry"}\n')
    argv = ["route", str(docs), "--model-file", str(tmp_path / "m.model"), "--model", "huts"]
    assert cli.main(argv) == 2
    assert "one or the other" in capsys.readouterr().err
    # and the old two-positional form is an argparse usage error, not documents read as a model
    with pytest.raises(SystemExit) as stop:
        cli.main(["route", str(tmp_path / "m.model"), str(docs)])
    assert stop.value.code == 2


def test_client_commands_find_the_api_that_serve_wrote(tmp_path: Path, monkeypatch) -> None:
    monkeypatch.delenv("MIXROUTE_API_URL", raising=False)
    monkeypatch.setenv("MIXROUTE_DATA_DIR", str(tmp_path))
    monkeypatch.setenv("MIXROUTE_PORT", "8000")
    assert cli.default_api_url() == "http://127.0.0.1:8000"  # nothing running: the settings
    write_address(tmp_path, ServeAddress("http://127.0.0.1:8765", "unix:///x.sock", os.getpid()))
    assert cli.default_api_url() == "http://127.0.0.1:8765"
    monkeypatch.setenv("MIXROUTE_API_URL", "http://api.example:9000")
    assert cli.default_api_url() == "http://api.example:9000"  # the explicit setting wins
    remove_address(tmp_path, os.getpid())
    assert read_address(tmp_path) is None


def test_a_stale_address_file_is_ignored(tmp_path: Path, monkeypatch) -> None:
    import subprocess
    import sys

    # a pid that certainly ended: a child we waited for
    child = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], check=True,
                           capture_output=True, text=True)  # fmt: skip
    write_address(tmp_path, ServeAddress("http://127.0.0.1:8765", None, int(child.stdout)))
    monkeypatch.delenv("MIXROUTE_API_URL", raising=False)
    monkeypatch.setenv("MIXROUTE_DATA_DIR", str(tmp_path))
    monkeypatch.setenv("MIXROUTE_PORT", "8111")
    assert cli.default_api_url() == "http://127.0.0.1:8111"


def test_work_uses_the_redis_of_a_running_serve(tmp_path: Path, monkeypatch) -> None:
    from service import runner

    monkeypatch.delenv("REDIS_URL", raising=False)
    monkeypatch.delenv("MIXROUTE_REDIS_URL", raising=False)
    write_address(tmp_path, ServeAddress("http://127.0.0.1:8765", "unix:///r.sock", os.getpid()))
    used: list[str] = []

    class Pool:
        def __init__(self, url: str, models: object = None) -> None:
            used.append(url)
            raise _AskedError(url)

    import worker.pool

    monkeypatch.setattr(runner, "WorkerPool", Pool)  # `work --model`
    monkeypatch.setattr(worker.pool, "PoolMember", Pool)  # `work`: a member of the pool
    monkeypatch.setattr(runner, "_configure_logging", lambda settings: None)
    with pytest.raises(_AskedError):
        runner.work(data_dir=tmp_path)
    with pytest.raises(_AskedError):
        runner.work(model="inbox", data_dir=tmp_path)
    assert used == ["unix:///r.sock", "unix:///r.sock"]


@pytest.mark.parametrize(
    ("value", "shown"),
    [
        (8.441629290931999e-39, "<0.001"),
        (0.99999993, ">0.999"),
        (0.5, "0.500"),
        (1.0, ">0.999"),
        (0.0, "0"),
    ],
)
def test_probabilities_for_people(value: float, shown: str) -> None:
    assert cli.format_probability(value) == shown


def test_rollback_times_read_as_iso_or_unix() -> None:
    # 2026-05-03T14:00:00Z is 1777816800 unix seconds (computed with GNU date -d, UTC)
    assert cli.parse_time("2026-05-03T14:00") == 1777816800.0
    assert cli.parse_time("2026-05-03T16:00+02:00") == 1777816800.0
    assert cli.parse_time("1777816800") == 1777816800.0
    with pytest.raises(cli.CommandError):
        cli.parse_time("yesterday")


def test_models_list_is_honest_before_the_warm_up() -> None:
    warming = {"warmed_up": False, "documents_learned": 512, "config": {"warmup_documents": 1000}}
    assert cli._learned_or_warming(warming) == "warming up: 512 of 1,000 buffered"
    ready = {"warmed_up": True, "documents_learned": 12345, "config": {}}
    assert cli._learned_or_warming(ready) == "12,345 documents learned"
