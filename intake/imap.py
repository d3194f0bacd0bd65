"""The IMAP intake: route every new message of a folder, queue it for learning, then file it.

One round (:meth:`ImapIntake.run_round`) takes the folder's messages whose UID is above the
model's intake mark (:mod:`state.intake_marks`), oldest first, and for each one:

1. fetches it without setting ``\\Seen`` (``BODY.PEEK[]``) and parses it (:mod:`intake.message`);
2. routes it with the model's latest checkpoint, read from Redis when its version moves;
3. queues it for learning under its Message-ID (a repeat of the id is not queued twice);
4. files it: ``UID MOVE`` to its group's folder (RFC 6851; created when missing), or a keyword,
   or nothing, as configured; review true goes to the review folder;
5. moves the mark to its UID.

Exactly once across crashes: a crash before 5 repeats 1-4 for that message on restart, which
queues nothing twice (3 is idempotent) and files nothing twice (a moved message is no longer in
the folder; a marked one carries our keyword and is skipped; one left in place is only marked).
A message that cannot be parsed is left in place, logged, and passed by the mark.

Before the model's first checkpoint there is nothing to route with: new messages are queued
for learning (so the model can warm up on them) and left in place, and filing starts once a
checkpoint exists.

Between rounds the intake waits in IDLE (RFC 2177) when the server offers it, else it polls.
A dropped connection, a server error or Redis being away ends the round; the intake reconnects
with exponential backoff (with jitter) and resumes from the mark, so nothing is lost.

Every move is logged (``message_id``, ``uid``, ``from_folder``, ``to_folder``) so an operator
can undo it; the password never reaches a log line.

Corrections from the operators' hands (``filing = "move"``): before moving a message the intake
marks it with the keyword of where it sends it (``<keyword_prefix>review`` or
``<keyword_prefix>group-<id>``); IMAP keeps a message's flags through MOVE and COPY. After each
round :meth:`ImapIntake.collect_hand_moves` looks in every group's destination folder
(:meth:`ImapIntake.destination_folders`) for messages whose routing keyword names another place
(the review folder, or another group's folder): an operator moved them there by hand. Each
becomes a correction to that folder's group (a labelled entry on the stream, as ``POST
.../corrections`` queues it; its id is the Message-ID, the id it was queued for learning with),
and its keyword is then set to the folder's own, so it is taken once; a crash in between takes
it again, which the model ignores (a correction is idempotent per id and group). Messages
without a routing keyword (filed before this, or dropped in from elsewhere) are left alone.
"""

from __future__ import annotations

import contextlib
import imaplib
import logging
import random
import re
import select
import ssl
import threading
import time
from collections.abc import Callable
from typing import Any

import redis

from intake.config import ImapConfig
from intake.decide import Decision, folder_name
from intake.folders import keyword, quote_mailbox
from intake.message import MailDocument, MessageError, parse_message
from intake.model_view import ModelView
from mixture.errors import MixrouteError
from mixture.stats import MixtureState
from state.connection import REDIS_TRANSIENT_ERRORS
from state.errors import ModelNotFoundError, StateError
from state.group_drift import group_ids_of
from state.intake_marks import IntakeMarks
from state.routed_log import RoutedLog, RoutedRecord
from state.store import ModelStore
from state.stream import correction_fields

log = logging.getLogger(__name__)

_FLAGS = re.compile(rb"FLAGS \(([^)]*)\)")
_UID = re.compile(rb"UID (\d+)")


class IntakeError(MixrouteError):
    """A failure retrying cannot fix (login refused, folder missing); the text says which."""


class ImapCommandError(Exception):
    """A command the server answered NO or BAD to (retried after a reconnect)."""


# Failures that end a round and are retried after a backoff, on a new connection.
RECOVERABLE: tuple[type[BaseException], ...] = (
    imaplib.IMAP4.abort,
    imaplib.IMAP4.error,
    ImapCommandError,
    OSError,
    EOFError,
    *REDIS_TRANSIENT_ERRORS,
    StateError,
)


def open_connection(config: ImapConfig) -> imaplib.IMAP4:
    """Connect and log in as the configuration says (TLS, STARTTLS or plain).

    Raises
    ------
    IntakeError
        When the server refuses the login (wrong user or password: retrying would not help).
    """
    host, port, timeout = config.host, config.effective_port, config.timeout_seconds
    conn: imaplib.IMAP4
    context = ssl.create_default_context(cafile=config.ca_file)  # verifies certificate and name
    if config.security == "tls":
        conn = imaplib.IMAP4_SSL(host, port, ssl_context=context, timeout=timeout)
    else:
        conn = imaplib.IMAP4(host, port, timeout=timeout)
        if config.security == "starttls":
            conn.starttls(context)
    try:
        conn.login(config.user, config.password)
    except imaplib.IMAP4.abort:
        raise
    except imaplib.IMAP4.error as exc:
        conn.shutdown()
        # the server's words only: imaplib never puts the password in the exception
        raise IntakeError(f"IMAP login to {host}:{port} as {config.user} refused: {exc}") from None
    return conn


class ImapIntake:
    """Watch one IMAP folder for one model; thread-safe :meth:`stop`.

    Parameters
    ----------
    client : redis.Redis
        The model's Redis.
    model : str
        The model that routes (and learns from) the messages.
    config : ImapConfig
    connect : callable, optional
        ``config -> logged-in IMAP4`` (default :func:`open_connection`).
    """

    def __init__(
        self,
        client: redis.Redis,
        model: str,
        config: ImapConfig,
        *,
        connect: Callable[[ImapConfig], imaplib.IMAP4] | None = None,
    ) -> None:
        self.config = config
        self.store = ModelStore(client, model)
        self.marks = IntakeMarks(client, model, config.label)
        self.routed = RoutedLog(client, model)
        self._connect_fn = connect or open_connection
        self.conn: imaplib.IMAP4 | None = None
        self.capabilities: frozenset[str] = frozenset()
        self.uidvalidity = 0
        self.filed = 0
        self.unreadable = 0
        self.reconnects = 0
        self.waiting_for_model = False
        self.idling = threading.Event()
        self._stop = threading.Event()
        self.view = ModelView(self.store, config.review_unknown_share)
        self._folders: set[str] = set()
        self._queued_waiting: set[tuple[int, int]] = set()
        self._idle_tag = 0
        self.corrections = 0  # hand moves turned into corrections (this process)

    # -- running ------------------------------------------------------------------------------

    def stop(self) -> None:
        """Ask :meth:`run` to return after the message in hand (from any thread)."""
        self._stop.set()

    @property
    def stopping(self) -> bool:
        return self._stop.is_set()

    def run(self) -> None:
        """Round after round until :meth:`stop`; reconnects after failures with backoff.

        Raises
        ------
        IntakeError
            Login refused or folder missing.
        """
        delay = self.config.backoff_initial
        try:
            while not self.stopping:
                try:
                    if self.conn is None:
                        self.connect()
                    handled = self.run_round()
                    if handled == 0 and not self.stopping:
                        self.collect_hand_moves()
                    delay = self.config.backoff_initial
                    if handled == 0 and not self.stopping:
                        self.wait_for_mail()
                except ModelNotFoundError:
                    log.error("intake: model %s was deleted; stopping", self.store.keys.model)
                    return
                except RECOVERABLE as exc:
                    self._drop()
                    self.reconnects += 1
                    pause = delay * (1.0 + 0.25 * random.random())
                    log.warning(
                        "intake: %s (%s); reconnecting in %.1f s",
                        type(exc).__name__,
                        _short(exc),
                        pause,
                        extra={"folder": self.config.folder},
                    )
                    self._stop.wait(pause)
                    delay = min(delay * 2.0, self.config.backoff_max)
        finally:
            self.close()

    def run_until_idle(self) -> int:
        """Connect, handle everything new, and return the number handled (``--once``): filed
        ones (:attr:`filed`) and unreadable ones left in place (:attr:`unreadable`)."""
        total = 0
        try:
            self.connect()
            while not self.stopping:
                handled = self.run_round()
                total += handled
                if handled == 0:
                    self.collect_hand_moves()
                    break
        finally:
            self.close()
        return total

    def close(self) -> None:
        """Log out (quietly) if connected."""
        conn, self.conn = self.conn, None
        if conn is not None:
            with contextlib.suppress(OSError, imaplib.IMAP4.error, EOFError):
                conn.logout()

    def _drop(self) -> None:
        conn, self.conn = self.conn, None
        if conn is not None:
            with contextlib.suppress(OSError):
                conn.shutdown()

    def connect(self) -> None:
        """Log in, learn the capabilities, select the folder and read its UIDVALIDITY."""
        conn = self._connect_fn(self.config)
        self.conn = conn
        _, data = self._ok(conn.capability())
        self.capabilities = frozenset((data[0] or b"").decode("ascii", "replace").upper().split())
        typ, data = conn.select(quote_mailbox(self.config.folder))
        if typ != "OK":
            raise IntakeError(f"IMAP folder {self.config.folder!r} cannot be selected: {data!r}")
        _, values = conn.response("UIDVALIDITY")
        if not values or values[0] is None:
            raise IntakeError("the IMAP server gave no UIDVALIDITY for the folder")
        self.uidvalidity = int(values[0])
        self._folders.clear()
        log.info(
            "intake: watching %s (UIDVALIDITY %d, %s)",
            self.config.label,
            self.uidvalidity,
            "IDLE" if self._can_idle() else f"polling every {self.config.poll_seconds:g} s",
        )

    # -- one round ----------------------------------------------------------------------------

    def run_round(self) -> int:
        """Handle the new messages of the folder (at most ``batch``); how many were handled."""
        conn = self._need_conn()
        # NOOP lets the server bring the session's view up to date (mail appended by another
        # session is not seen by SEARCH until the mailbox is synchronised)
        self._ok(conn.noop())
        last = self._last_uid()
        _, data = self._ok(conn.uid("SEARCH", f"UID {last + 1}:*"))
        # "n:*" also answers the highest UID when it is below n (RFC 3501 6.4.8): filter
        uids = sorted(u for u in (int(x) for x in (data[0] or b"").split()) if u > last)
        if not uids:
            return 0
        state = self._current_state()
        if state is None:
            self._queue_while_waiting(uids)
            return 0
        if self.waiting_for_model:
            log.info("intake: the model has a checkpoint now; filing starts")
            self.waiting_for_model = False
        handled = 0
        for uid in uids[: self.config.batch]:
            if self.stopping:
                break
            self._handle(uid, state)
            handled += 1
            state = self._current_state() or state
        return handled

    def _last_uid(self) -> int:
        mark = self.marks.get()
        if mark is not None and mark.uidvalidity == self.uidvalidity:
            return mark.last_uid
        if mark is not None:
            # the server renumbered the folder: every UID is new; Message-IDs keep the
            # learning exactly once, and moved messages are no longer here
            log.warning(
                "intake: UIDVALIDITY of %s changed from %d to %d; starting the folder over",
                self.config.label,
                mark.uidvalidity,
                self.uidvalidity,
            )
        self.marks.reset(self.uidvalidity)
        return 0

    def _handle(self, uid: int, state: MixtureState) -> None:
        raw, flags = self._fetch(uid)
        if raw is None:  # expunged by someone else meanwhile
            self.marks.advance(self.uidvalidity, uid)
            return
        try:
            mail = parse_message(raw, strip_quotes=self.config.strip_quotes)
        except MessageError as exc:
            self.unreadable += 1
            log.warning(
                "intake: unreadable message left in place: %s",
                exc,
                extra={"uid": uid, "folder": self.config.folder},
            )
            self.marks.advance(self.uidvalidity, uid)
            return
        decision = self.view.decide(mail.text, state)
        self._queue(mail, uid)
        target = self._file(uid, mail, decision, flags)
        self.marks.advance(self.uidvalidity, uid)
        self.filed += 1
        self._record(mail, decision, target)
        log.info(
            "intake: filed message %s",
            mail.id,
            extra={
                "message_id": mail.id,
                "uid": uid,
                "from_folder": self.config.folder,
                "to_folder": target,
                "filing": self.config.filing,
                "group": decision.group,
                "posterior": round(decision.posterior, 4),
                "review": decision.review,
            },
        )

    def _record(self, mail: MailDocument, decision: Decision, target: str) -> None:
        # after the mark: a crash here loses one export row, never files twice
        self.routed.record(
            RoutedRecord(
                mail.id,
                mail.received or time.time(),
                decision.group,
                decision.label,
                decision.posterior,
                decision.review,
                target,
            )
        )

    def _queue(self, mail: MailDocument, uid: int) -> None:
        metadata = {"source": "imap", "uid": uid, **mail.metadata}
        self.store.enqueue([mail.text], ids=[mail.id], metadata=[metadata], received=mail.received)

    def _queue_while_waiting(self, uids: list[int]) -> None:
        if not self.waiting_for_model:
            log.info(
                "intake: model %s cannot route yet (warming up): new mail is queued for "
                "learning and left in place until it can",
                self.store.keys.model,
            )
            self.waiting_for_model = True
        for uid in uids:
            if self.stopping:
                return
            if (self.uidvalidity, uid) in self._queued_waiting:
                continue
            raw, _ = self._fetch(uid)
            if raw is None:
                continue
            try:
                mail = parse_message(raw, strip_quotes=self.config.strip_quotes)
            except MessageError:
                continue  # reported when it is filed
            self._queue(mail, uid)
            self._queued_waiting.add((self.uidvalidity, uid))

    def _current_state(self) -> MixtureState | None:
        return self.view.refresh()

    # -- filing -------------------------------------------------------------------------------

    def destination_folders(self) -> dict[int, str]:
        """The folder per group id this intake files into (where hand moves are looked for)."""
        out = {}
        state = self.view.state
        for group in group_ids_of(state) if state is not None else []:
            entry = self.view.labels.get(group)
            decision = Decision(
                group, 1.0, False, (), getattr(entry, "label", None),
                getattr(entry, "destination", None),
            )  # fmt: skip
            out[group] = folder_name(decision, prefix=self.config.folder_prefix, review_folder=None)
        return out

    def _routing_keyword(self, group: int | None) -> str:
        """The keyword a moved message carries: where the intake sent it (None: review)."""
        name = "review" if group is None else f"group-{group}"
        return keyword(self.config.keyword_prefix + "routed-", name)

    def collect_hand_moves(self) -> int:
        """Queue a correction for every message an operator moved by hand into a group's
        destination folder (see the module docstring); returns how many were queued."""
        if self.config.filing != "move" or self._current_state() is None:
            return 0
        conn = self._need_conn()
        prefix = (self.config.keyword_prefix + "routed-").lower()
        queued = 0
        by_folder: dict[str, list[int]] = {}
        for group, folder in self.destination_folders().items():
            by_folder.setdefault(folder, []).append(group)
        # a folder several groups share says nothing about which one the operator meant
        targets = [
            (groups[0], folder)
            for folder, groups in sorted(by_folder.items())
            if len(groups) == 1 and folder not in (self.config.folder, self.config.review_folder)
        ]
        try:
            for group, folder in targets:
                if self.stopping:
                    break
                own = self._routing_keyword(group)
                quoted = quote_mailbox(folder)
                typ, _ = conn.select(quoted)
                if typ != "OK":
                    continue  # nothing was ever filed there
                _, data = self._ok(conn.uid("SEARCH", "UNKEYWORD", own))
                for uid in (int(x) for x in (data[0] or b"").split()):
                    raw, flags = self._fetch(uid)
                    foreign = [f for f in flags if f.lower().startswith(prefix)]
                    if raw is None or not foreign:
                        continue  # not one the intake moved: left alone
                    try:
                        mail = parse_message(raw, strip_quotes=self.config.strip_quotes)
                    except MessageError:
                        continue
                    fields = correction_fields(mail.id, group, mail.text, "correction", time.time())
                    stream_id = self.store.enqueue_labelled([fields])[0]
                    removed = "(" + " ".join(foreign) + ")"
                    self._ok(conn.uid("STORE", str(uid), "-FLAGS.SILENT", removed))
                    self._ok(conn.uid("STORE", str(uid), "+FLAGS.SILENT", f"({own})"))
                    queued += 1
                    log.info(
                        "intake: message %s moved by hand to %s: correction to group %d",
                        mail.id,
                        folder,
                        group,
                        extra={
                            "message_id": mail.id,
                            "to_folder": folder,
                            "group": group,
                            "stream_id": stream_id,
                        },
                    )
        finally:
            self._ok(conn.select(quote_mailbox(self.config.folder)))
        self.corrections += queued
        return queued

    def _file(self, uid: int, mail: MailDocument, decision: Decision, flags: list[str]) -> str:
        config = self.config
        conn = self._need_conn()
        if config.filing == "none":
            return config.folder
        target = folder_name(
            decision, prefix=config.folder_prefix, review_folder=config.review_folder
        )
        if config.filing == "keyword":
            name = "review" if decision.review and config.review_folder else target
            flag = keyword(config.keyword_prefix, name)
            if any(f.startswith(config.keyword_prefix) for f in flags):
                return flag  # marked before a crash: not twice
            self._ok(conn.uid("STORE", str(uid), "+FLAGS.SILENT", f"({flag})"))
            return flag
        self._ensure_folder(target)
        quoted = quote_mailbox(target)
        # where it was sent travels with it (flags survive MOVE and COPY): a later move by hand
        # to another group's folder is then told apart from the intake's own filing
        reviewed = decision.review and config.review_folder is not None
        routed = self._routing_keyword(None if reviewed else decision.group)
        self._ok(conn.uid("STORE", str(uid), "+FLAGS.SILENT", f"({routed})"))
        if "MOVE" in self.capabilities:
            self._ok(conn.uid("MOVE", str(uid), quoted))
        else:  # COPY + delete; look first, so that a crash between the two copies once
            if not self._holds_message(target, mail.id):
                self._ok(conn.uid("COPY", str(uid), quoted))
            self._ok(conn.uid("STORE", str(uid), "+FLAGS.SILENT", r"(\Deleted)"))
            if "UIDPLUS" in self.capabilities:
                self._ok(conn.uid("EXPUNGE", str(uid)))
            else:
                self._ok(conn.expunge())
        return target

    def _ensure_folder(self, name: str) -> None:
        if name in self._folders:
            return
        conn = self._need_conn()
        quoted = quote_mailbox(name)
        _, listed = self._ok(conn.list('""', quoted))
        if not any(item for item in listed if item):
            typ, data = conn.create(quoted)
            text = b" ".join(d for d in data if isinstance(d, bytes))
            if typ != "OK" and b"ALREADYEXISTS" not in text.upper():
                raise ImapCommandError(f"CREATE {name!r}: {text.decode(errors='replace')}")
            conn.subscribe(quoted)
            log.info("intake: created folder %s", name, extra={"to_folder": name})
        self._folders.add(name)

    def _holds_message(self, folder: str, message_id: str) -> bool:
        conn = self._need_conn()
        self._ok(conn.select(quote_mailbox(folder), readonly=True))
        try:
            needle = '"' + message_id.replace("\\", "\\\\").replace('"', '\\"') + '"'
            _, data = self._ok(conn.uid("SEARCH", "HEADER", "Message-ID", needle))
            return bool((data[0] or b"").split())
        finally:
            self._ok(conn.select(quote_mailbox(self.config.folder)))

    def _fetch(self, uid: int) -> tuple[bytes | None, list[str]]:
        conn = self._need_conn()
        _, data = self._ok(conn.uid("FETCH", str(uid), "(UID FLAGS BODY.PEEK[])"))
        raw: bytes | None = None
        flags: list[str] = []
        for index, item in enumerate(data):
            head = item[0] if isinstance(item, tuple) else item
            if not isinstance(head, bytes):
                continue
            found = _UID.search(head)
            if found is None or int(found.group(1)) != uid:
                continue  # an unsolicited FETCH about another message
            if isinstance(item, tuple):
                raw = item[1]
            # FLAGS may come before the literal (in the head) or after it (the next piece)
            after = data[index + 1] if index + 1 < len(data) else b""
            for piece in (head, after if isinstance(after, bytes) else b""):
                match = _FLAGS.search(piece)
                if match:
                    flags = match.group(1).decode("ascii", "replace").split()
        return raw, flags

    # -- waiting ------------------------------------------------------------------------------

    def _can_idle(self) -> bool:
        return self.config.use_idle and "IDLE" in self.capabilities

    def wait_for_mail(self) -> None:
        """IDLE until the server reports a change (or ``idle_seconds``), else sleep a poll."""
        if self.waiting_for_model or not self._can_idle():
            self._stop.wait(self.config.poll_seconds)
            return
        self._idle(self.config.idle_seconds)

    def _idle(self, seconds: float) -> None:
        conn = self._need_conn()
        self._idle_tag += 1
        tag = f"MXI{self._idle_tag}".encode()
        conn.send(tag + b" IDLE\r\n")
        line = conn.readline()
        if not line.startswith(b"+"):
            raise ImapCommandError(f"IDLE refused: {line[:200]!r}")
        self.idling.set()
        sock = conn.socket()
        deadline = time.monotonic() + seconds
        try:
            while not self.stopping:
                remaining = deadline - time.monotonic()
                if remaining <= 0:
                    break
                pending = isinstance(sock, ssl.SSLSocket) and sock.pending() > 0
                if not pending:
                    ready, _, _ = select.select([sock], [], [], min(0.5, remaining))
                    if not ready:
                        continue
                line = conn.readline()
                if not line:
                    raise imaplib.IMAP4.abort("connection closed during IDLE")
                if line.startswith(b"* BYE"):
                    raise imaplib.IMAP4.abort(f"server said {line[:200]!r}")
                if re.match(rb"\* \d+ (EXISTS|RECENT)", line):
                    break
        finally:
            self.idling.clear()
        conn.send(b"DONE\r\n")
        while True:
            line = conn.readline()
            if not line:
                raise imaplib.IMAP4.abort("connection closed ending IDLE")
            if line.startswith(tag):
                if not line[len(tag) :].strip().upper().startswith(b"OK"):
                    raise ImapCommandError(f"IDLE ended with {line[:200]!r}")
                return

    # -- helpers ------------------------------------------------------------------------------

    def _need_conn(self) -> imaplib.IMAP4:
        if self.conn is None:
            raise imaplib.IMAP4.abort("not connected")
        return self.conn

    @staticmethod
    def _ok(reply: tuple[str, list[Any]]) -> tuple[str, list[Any]]:
        typ, data = reply
        if typ != "OK":
            text = b" ".join(d for d in data if isinstance(d, bytes)).decode(errors="replace")
            raise ImapCommandError(f"server answered {typ}: {text[:200]}")
        return typ, data


def _short(exc: BaseException) -> str:
    return str(exc)[:200] or type(exc).__name__
