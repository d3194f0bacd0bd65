"""The SMTP door: accept mail an MTA forwards, route it, forward it to the group's address.

For each message (``DATA``): parse it, route it with the model's latest checkpoint, queue it
for learning under its Message-ID, and forward it unchanged but for one added header
(``X-Mixroute-Route: group=<k>; posterior=<p>; review=<yes|no>``) through the configured
relay to the group's destination address (the review address for review true, the fallback
address when the group has none). Only then is ``250`` answered.

Whenever that cannot be done now, the answer is a temporary failure (``451``): Redis down or
its cluster changing hands (MOVED, READONLY, ...), no checkpoint yet, the relay refusing or
away, no address for the group, or an unexpected error of the door's own (aiosmtpd would
answer 500, and the sender would bounce the mail). The MTA keeps the
message and retries (RFC 5321 section 4.2.5: a 4yz reply means "try again later"), so
nothing is lost. Learning stays exactly once across retries (the Message-ID is idempotent);
forwarding is at least once (a retry after a 250 the MTA never heard can forward twice, as with
any SMTP hop).

A message that cannot be parsed goes to the review (else fallback) address unrouted, or is
refused with 554 when neither is set. Needs the optional ``aiosmtpd`` package
(``pip install 'mixroute[smtp]'``).
"""

from __future__ import annotations

import asyncio
import logging
import smtplib
import ssl
import time
from dataclasses import dataclass, field
from typing import Any

import redis

from intake.decide import Decision, address_of
from intake.message import MessageError, parse_message
from intake.model_view import ModelView
from mixture.errors import ConfigError
from state.connection import REDIS_TRANSIENT_ERRORS
from state.errors import ModelNotFoundError, StateError
from state.routed_log import RoutedLog, RoutedRecord
from state.store import ModelStore

log = logging.getLogger(__name__)

ROUTE_HEADER = "X-Mixroute-Route"


@dataclass(frozen=True)
class SmtpDoorConfig:
    """Where the door listens and where it forwards.

    ``relay_security``: ``starttls`` (default), ``tls`` or ``plain`` (plain only to a loopback
    relay, as for IMAP). ``relay_password`` never appears in a repr or a log line.
    """

    listen_host: str = "127.0.0.1"
    listen_port: int = 8025
    relay_host: str = "127.0.0.1"
    relay_port: int = 25
    relay_security: str = "starttls"
    relay_user: str = ""
    relay_password: str = field(default="", repr=False)
    review_address: str | None = None
    fallback_address: str | None = None
    timeout_seconds: float = 30.0
    strip_quotes: bool = True
    review_unknown_share: float = 0.5

    def __post_init__(self) -> None:
        from intake.config import is_loopback

        if self.relay_security not in ("starttls", "tls", "plain"):
            raise ConfigError("smtp_relay_security must be starttls, tls or plain")
        if self.relay_security == "plain" and self.relay_user and not is_loopback(self.relay_host):
            raise ConfigError("a relay password is sent only over TLS to a remote relay")


class RoutingDoor:
    """The aiosmtpd handler (``handle_DATA``); the work runs in a thread (Redis is blocking)."""

    def __init__(self, client: redis.Redis, model: str, config: SmtpDoorConfig) -> None:
        self.config = config
        self.store = ModelStore(client, model)
        self.view = ModelView(self.store, config.review_unknown_share)
        self.routed = RoutedLog(client, model)
        self.forwarded = 0
        self.deferred = 0
        self._lock = asyncio.Lock()

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:  # noqa: N802
        raw = envelope.original_content or envelope.content
        if isinstance(raw, str):
            raw = raw.encode("utf-8", errors="surrogateescape")
        async with self._lock:  # one message at a time: the model view is shared
            try:
                reply = await asyncio.to_thread(self.deliver, raw, envelope.mail_from or "")
            except Exception:
                # aiosmtpd would answer 500 and the sender would bounce the mail: an error of
                # ours must leave the mail with the sender, to be retried (RFC 5321 4.2.5)
                log.exception("smtp door: unexpected error; answering 451")
                reply = "451 4.3.0 temporary failure of the routing door; try again later"
        if reply.startswith("4"):
            self.deferred += 1
        return reply

    def deliver(self, raw: bytes, mail_from: str) -> str:
        """Route, queue and forward one message; the SMTP reply line."""
        try:
            mail = parse_message(raw, strip_quotes=self.config.strip_quotes)
        except MessageError as exc:
            target = self.config.review_address or self.config.fallback_address
            if target is None:
                return f"554 5.6.0 message not readable ({exc}); no review address set"
            return self._forward(raw, mail_from, target, None, "unreadable")
        try:
            state = self.view.refresh()
            if state is None:
                return "451 4.3.0 the model cannot route yet (warming up); try again later"
            decision = self.view.decide(mail.text, state)
            metadata = {"source": "smtp", **mail.metadata}
            self.store.enqueue(
                [mail.text], ids=[mail.id], metadata=[metadata], received=mail.received
            )
        except REDIS_TRANSIENT_ERRORS as exc:  # a 4xx: the sender keeps the mail and retries
            log.warning("smtp door: Redis unreachable (%s); answering 451", type(exc).__name__)
            return "451 4.3.0 routing store unavailable; try again later"
        except ModelNotFoundError:
            return "451 4.3.0 the routing model does not exist; try again later"
        except StateError as exc:  # backpressure: the learning backlog is full
            return f"451 4.3.0 not accepted now ({str(exc)[:100]}); try again later"
        if decision.review and self.config.review_address:
            target: str | None = self.config.review_address
        else:
            target = address_of(decision) or self.config.fallback_address
        if target is None:
            return f"451 4.3.0 group {decision.group} has no destination address; try again later"
        reply = self._forward(raw, mail_from, target, decision, mail.id)
        if reply.startswith("250"):
            record = RoutedRecord(
                mail.id,
                mail.received or time.time(),
                decision.group,
                decision.label,
                decision.posterior,
                decision.review,
                target,
            )
            try:
                self.routed.record(record)
            except REDIS_TRANSIENT_ERRORS:
                log.warning("smtp door: routed record of %s not kept (Redis away)", mail.id)
        return reply

    def _forward(
        self, raw: bytes, mail_from: str, target: str, decision: Decision | None, message_id: str
    ) -> str:
        if decision is None:
            route = "unrouted"
        else:
            route = (
                f"group={decision.group}; posterior={decision.posterior:.4f}; "
                f"review={'yes' if decision.review else 'no'}"
            )
        data = f"{ROUTE_HEADER}: {route}\r\n".encode("ascii") + raw
        config = self.config
        try:
            relay = self._relay()
            try:
                relay.sendmail(mail_from, [target], data)
            finally:
                relay.quit()
        except (smtplib.SMTPException, OSError) as exc:
            log.warning("smtp door: relay failed (%s); answering 451", type(exc).__name__)
            return "451 4.4.1 relay unavailable; try again later"
        self.forwarded += 1
        log.info(
            "smtp door: forwarded message %s to %s",
            message_id,
            target,
            extra={
                "message_id": message_id,
                "to_address": target,
                "group": None if decision is None else decision.group,
                "review": None if decision is None else decision.review,
                "relay": f"{config.relay_host}:{config.relay_port}",
            },
        )
        return "250 2.0.0 routed and forwarded"

    def _relay(self) -> smtplib.SMTP:
        config = self.config
        if config.relay_security == "tls":
            relay: smtplib.SMTP = smtplib.SMTP_SSL(
                config.relay_host,
                config.relay_port,
                timeout=config.timeout_seconds,
                context=ssl.create_default_context(),
            )
        else:
            relay = smtplib.SMTP(
                config.relay_host, config.relay_port, timeout=config.timeout_seconds
            )
            if config.relay_security == "starttls":
                relay.starttls(context=ssl.create_default_context())
        if config.relay_user:
            relay.login(config.relay_user, config.relay_password)
        return relay


def start_door(client: redis.Redis, model: str, config: SmtpDoorConfig) -> Any:
    """Start the door on its own thread; returns the started aiosmtpd ``Controller``
    (``.stop()`` ends it; ``.handler`` is the :class:`RoutingDoor`)."""
    try:
        from aiosmtpd.controller import Controller
    except ImportError:
        raise ConfigError("the SMTP door needs aiosmtpd: pip install 'mixroute[smtp]'") from None
    door = RoutingDoor(client, model, config)
    controller = Controller(door, hostname=config.listen_host, port=config.listen_port)
    controller.start()
    log.info("smtp door: listening on %s:%d", config.listen_host, config.listen_port)
    return controller
