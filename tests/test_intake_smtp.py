"""The SMTP door: mail an MTA hands it is routed, queued for learning and forwarded to the
group's address through a relay (an aiosmtpd sink here); when Redis is down it answers a
temporary failure (451), the client keeps the message, and the retry is delivered once."""

from __future__ import annotations

import email
import smtplib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from intake.compose import MailDraft, compose
from intake.smtp_door import ROUTE_HEADER, SmtpDoorConfig, start_door
from mixture.config import MixtureConfig
from mixture.em import fit_texts
from service.demo_data import default_days, generate_day
from service.testing import free_port
from state.connection import EmbeddedRedis
from state.registry import Registry
from state.store import ModelStore
from tests.test_intake_imap import commit

aiosmtpd = pytest.importorskip("aiosmtpd")
from aiosmtpd.controller import Controller  # noqa: E402

pytestmark = pytest.mark.redis


class Sink:
    """The relay: keeps every envelope it is given."""

    def __init__(self) -> None:
        self.received: list[tuple[str, list[str], bytes]] = []

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:  # noqa: N802
        self.received.append((envelope.mail_from, list(envelope.rcpt_tos), envelope.content))
        return "250 OK"


@pytest.fixture
def relay() -> Iterator[tuple[Sink, int]]:
    sink = Sink()
    port = free_port()
    controller = Controller(sink, hostname="127.0.0.1", port=port)
    controller.start()
    yield sink, port
    controller.stop()


def _messages(n: int, seed: int = 4):
    out = [m for plan in default_days(0.4)[:3] for m in generate_day(plan, seed)]
    return [m for m in out if m.theme != "junk"][:n]


@pytest.fixture(scope="module")
def state_and_addresses():
    messages = _messages(700, seed=31)
    state, _ = fit_texts(
        [m.text for m in messages], MixtureConfig(n_groups=8, n_restarts=2, max_iter=60), seed=2
    )
    return state


def _setup(client, name: str, state) -> ModelStore:
    Registry(client).create(name, state.config)
    store = ModelStore(client, name)
    commit(store, state)
    for group in range(state.n_groups):
        store.set_group_label(group, f"g{group}", f"team-{group}@ferry.invalid")
    return store


def _send(port: int, raw: bytes) -> None:
    with smtplib.SMTP("127.0.0.1", port, timeout=30) as client:
        client.sendmail("passenger@example.invalid", ["inbox@ferry.invalid"], raw)


def test_door_routes_queues_and_forwards_to_the_group_address(
    relay, redis_client, model_name, state_and_addresses
) -> None:
    sink, relay_port = relay
    store = _setup(redis_client, model_name, state_and_addresses)
    config = SmtpDoorConfig(
        listen_port=free_port(),
        relay_port=relay_port,
        relay_security="plain",
        review_address="review@ferry.invalid",
    )
    controller = start_door(redis_client, model_name, config)
    door = controller.handler
    try:
        mail = _messages(10, seed=99)
        for i, m in enumerate(mail):
            _send(
                config.listen_port, compose(MailDraft(f"s{i}@x.invalid", m.text, 1.7e9)).as_bytes()
            )
    finally:
        controller.stop()
    assert door.forwarded == 10 and len(sink.received) == 10
    for (_, rcpts, content), _m in zip(sink.received, mail, strict=True):
        forwarded = email.message_from_bytes(content)
        route = forwarded[ROUTE_HEADER]
        group = int(route.split(";")[0].split("=")[1])
        expect = "review@ferry.invalid" if "review=yes" in route else f"team-{group}@ferry.invalid"
        assert rcpts == [expect]
        assert forwarded["Message-ID"].strip("<>").startswith("s")
    ids = sorted(f[b"id"].decode() for _, f in redis_client.xrange(store.keys.docs))
    assert ids == sorted(f"s{i}@x.invalid" for i in range(10))


def test_redis_down_answers_451_and_the_retry_is_delivered_once(
    relay, tmp_path: Path, state_and_addresses
) -> None:
    sink, relay_port = relay
    server = EmbeddedRedis(tmp_path / "redis", appendfsync="always").start()
    client = server.client(socket_timeout=2)
    try:
        store = _setup(client, "door", state_and_addresses)
        config = SmtpDoorConfig(
            listen_port=free_port(), relay_port=relay_port, relay_security="plain"
        )
        controller = start_door(client, "door", config)
        raw = compose(MailDraft("retry-1@x.invalid", _messages(1)[0].text, 1.7e9)).as_bytes()
        try:
            server.stop()
            with pytest.raises(smtplib.SMTPDataError) as refused:
                _send(config.listen_port, raw)
            # RFC 5321 4.2.5: 4yz is a transient failure, the sender queues and retries
            assert refused.value.smtp_code == 451
            assert sink.received == []
            server.start()
            _send(config.listen_port, raw)  # the MTA's retry
            _send(config.listen_port, raw)  # and a duplicate retry: learned once
        finally:
            controller.stop()
        assert len(sink.received) == 2  # forwarding is at least once (see the module)
        assert [f[b"id"] for _, f in client.xrange(store.keys.docs)] == [b"retry-1@x.invalid"]
    finally:
        client.close()
        server.stop()


def test_relay_down_answers_451(redis_client, model_name, state_and_addresses) -> None:
    _setup(redis_client, model_name, state_and_addresses)
    config = SmtpDoorConfig(listen_port=free_port(), relay_port=free_port(), relay_security="plain")
    controller = start_door(redis_client, model_name, config)
    try:
        raw = compose(MailDraft("r@x.invalid", _messages(1)[0].text, 1.7e9)).as_bytes()
        with pytest.raises(smtplib.SMTPDataError) as refused:
            _send(config.listen_port, raw)
        assert refused.value.smtp_code == 451
    finally:
        controller.stop()


def test_an_unexpected_error_answers_451_not_a_bounce(
    redis_client, model_name, state_and_addresses, caplog: pytest.LogCaptureFixture
) -> None:
    """aiosmtpd answers an exception in the handler with 500, and a 5yz makes the sender bounce
    the mail (RFC 5321 4.2.5); the door answers 451 instead, so the mail stays with the sender."""
    _setup(redis_client, model_name, state_and_addresses)
    config = SmtpDoorConfig(listen_port=free_port(), relay_port=free_port(), relay_security="plain")
    controller = start_door(redis_client, model_name, config)

    def broken(raw: bytes, mail_from: str) -> str:
        raise RuntimeError("a bug in the door")

    controller.handler.deliver = broken
    try:
        raw = compose(MailDraft("bug-1@x.invalid", _messages(1)[0].text, 1.7e9)).as_bytes()
        with pytest.raises(smtplib.SMTPDataError) as refused:
            _send(config.listen_port, raw)
        assert refused.value.smtp_code == 451
        assert controller.handler.deferred == 1
    finally:
        controller.stop()
    assert any("unexpected error" in r.getMessage() and r.exc_info for r in caplog.records)
