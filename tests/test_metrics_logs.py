"""Structured logs: one JSON object a line, context fields, redaction, console handlers only."""

from __future__ import annotations

import io
import json
import logging
import threading
from collections.abc import Iterator

import pytest

from service.logs import (
    JsonFormatter,
    SecretRedactor,
    configure_logging,
    model_var,
    request_id_var,
    request_metadata,
    valid_request_id,
)


@pytest.fixture
def capture() -> Iterator[tuple[logging.Logger, io.StringIO]]:
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonFormatter())
    logger = logging.getLogger(f"mixroute.test.{id(stream)}")
    logger.addHandler(handler)
    logger.setLevel(logging.DEBUG)
    logger.propagate = False
    yield logger, stream
    logger.removeHandler(handler)


def lines(stream: io.StringIO) -> list[dict]:
    return [json.loads(line) for line in stream.getvalue().splitlines()]


def test_one_json_line_per_event_with_extra_fields(capture) -> None:  # type: ignore[no-untyped-def]
    logger, stream = capture
    logger.info(
        "checkpoint %d",
        7,
        extra={"model": "inbox", "version": 7, "worker": "w1", "color_message": "\x1b[1m"},
    )
    try:
        raise ValueError("bad\nthing")
    except ValueError:
        logger.exception("failed on %s", "line\ntwo", extra={"batch": [1, 2]})
    first, second = lines(stream)  # two events, two lines, though messages hold newlines
    assert first["message"] == "checkpoint 7" and first["level"] == "info"
    assert (first["model"], first["version"], first["worker"]) == ("inbox", 7, "w1")
    assert first["time"].endswith("+00:00") and "color_message" not in first
    assert second["message"] == "failed on line\ntwo" and second["batch"] == [1, 2]
    assert "ValueError: bad" in second["exception"]


def test_request_context_and_worker_threads_fill_the_fields(capture) -> None:  # type: ignore[no-untyped-def]
    logger, stream = capture
    rid, model = request_id_var.set("req-1"), model_var.set("ferry")
    try:
        logger.info("inside a request")
        assert request_metadata(2) == [{"request_id": "req-1"}, {"request_id": "req-1"}]
    finally:
        request_id_var.reset(rid)
        model_var.reset(model)
    assert request_metadata(2) is None
    thread = threading.Thread(target=logger.info, args=("learning",), name="mixroute-worker-m1")
    thread.start()
    thread.join()
    inside, worker = lines(stream)
    assert inside["request_id"] == "req-1" and inside["model"] == "ferry"
    assert worker["model"] == "m1" and "request_id" not in worker


def test_request_ids_are_checked() -> None:
    assert valid_request_id("abc-1.2:3_4") == "abc-1.2:3_4"
    for bad in (None, "", "has space", "x" * 129, 'quote"'):
        generated = valid_request_id(bad)
        assert generated != bad and len(generated) == 32


def test_redactor_and_console_handlers_only(root_logging: logging.Logger) -> None:
    record = logging.LogRecord("x", logging.INFO, "", 0, "key=%s", ("abcdefghijklmnopqrst",), None)
    SecretRedactor(["abcdefghijklmnopqrst"]).filter(record)
    assert record.getMessage() == "key=[redacted]"
    keep = logging.StreamHandler(io.StringIO())  # e.g. a test's capture: must survive
    root_logging.addHandler(keep)
    out = io.StringIO()
    installed = configure_logging("warning", "text", stream=out)
    assert keep in root_logging.handlers and installed in root_logging.handlers
    logging.getLogger("mixroute.test").warning("plain %s", "text")
    assert out.getvalue().rstrip().endswith("WARNING mixroute.test: plain text")


def test_the_default_handler_follows_standard_error(
    capsys: pytest.CaptureFixture[str], root_logging: logging.Logger
) -> None:
    """A handler bound to the standard error of the moment it was made would later write to
    a closed file (a test runner's capture); ours looks sys.stderr up for every record."""
    configure_logging("info", "json")
    logging.getLogger("mixroute.test").info("first")
    first = capsys.readouterr().err
    configure_logging("info", "json")  # again: replaces its own handler, no duplicates
    logging.getLogger("mixroute.test").info("second")
    second = capsys.readouterr().err
    assert json.loads(first)["message"] == "first"
    assert [json.loads(line)["message"] for line in second.splitlines()] == ["second"]
