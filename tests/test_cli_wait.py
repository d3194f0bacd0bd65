"""``mixroute feed --wait``: it returns only once the API serves a state that has learned the
queued entries, not when the checkpoint is written (the API loads it a moment later, and the
next command's answers would miss them). No server: a scripted API client."""

from __future__ import annotations

from typing import Any

import pytest

from service.cli import CommandError, _wait_learned


class ScriptedApi:
    """Answers GET /models/NAME from a list of (stream watermark, served watermark)."""

    def __init__(self, script: list[tuple[str, str | None]]) -> None:
        self.script = script
        self.calls = 0

    def get(self, path: str) -> dict[str, Any]:
        stream, served = self.script[min(self.calls, len(self.script) - 1)]
        self.calls += 1
        body: dict[str, Any] = {"version": self.calls, "stream": {"watermark": stream}}
        if served is not None:
            body["served_watermark"] = served
        body["documents_learned"] = 0
        body["warmed_up"] = True
        body["status"] = "warmed up"
        return body


@pytest.fixture(autouse=True)
def no_sleep(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr("time.sleep", lambda _seconds: None)


def test_waits_for_the_served_state_not_only_the_checkpoint(capsys) -> None:
    api = ScriptedApi([("5-0", "1-0"), ("9-0", "1-0"), ("9-0", "5-0"), ("9-0", "9-0")])
    _wait_learned(api, "inbox", "9-0", timeout=60.0)  # type: ignore[arg-type]
    assert api.calls == 4  # the checkpoint was there at the second poll, the API at the fourth
    assert "learned through 9-0" in capsys.readouterr().out


def test_an_api_without_the_served_watermark_is_judged_by_the_stream() -> None:
    api = ScriptedApi([("5-0", None), ("9-3", None)])
    _wait_learned(api, "inbox", "9-2", timeout=60.0)  # type: ignore[arg-type]
    assert api.calls == 2


def test_times_out_with_both_watermarks_named(monkeypatch: pytest.MonkeyPatch) -> None:
    clock = iter(range(0, 1000, 10))
    monkeypatch.setattr("time.monotonic", lambda: float(next(clock)))
    api = ScriptedApi([("9-0", "1-0")])
    with pytest.raises(CommandError, match="served 1-0"):
        _wait_learned(api, "inbox", "9-0", timeout=25.0)  # type: ignore[arg-type]
