"""The IMAP intake against a real IMAP server (dovecot, started by the tests): every invented
message is routed, queued for learning and filed exactly once, across a SIGKILL mid-batch and
a server that drops the connection; IDLE wakes it; nothing is filed before the model has a
checkpoint. The folders are read back over IMAP from the server itself."""

from __future__ import annotations

import logging
import os
import signal
import ssl
import subprocess
import sys
import threading
import time
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis

from intake.compose import MailDraft, compose
from intake.config import ImapConfig
from intake.decide import decide, folder_name
from intake.folders import decode_mailbox, encode_mailbox
from intake.imap import ImapIntake
from intake.message import parse_message
from mixture.config import MixtureConfig
from mixture.em import fit_texts
from mixture.stats import MixtureState
from service.demo_data import default_days, generate_day
from service.testing import wait_until
from state.errors import ModelNotFoundError
from state.intake_marks import IntakeMarks, MarkConflictError
from state.records import WorkerStatus
from state.registry import Registry
from state.store import ModelStore
from state.versions import Checkpoint
from tests.imap_support import PASSWORD, USER, CuttableRelay, Dovecot, dovecot_missing

pytestmark = [
    pytest.mark.redis,
    pytest.mark.skipif(dovecot_missing() is not None, reason=str(dovecot_missing())),
]

K = 8
LOST_FOLDER = "Objets trouvés & lost"  # non-ASCII and '&': modified UTF-7 on the wire


@pytest.fixture
def dovecot() -> Iterator[Dovecot]:
    server = Dovecot().start()
    yield server
    server.stop()


@pytest.fixture(scope="module")
def fitted() -> tuple[MixtureState, dict[int, str]]:
    """A model fitted offline on invented ferry mail, and each group's majority theme."""
    messages = [m for plan in default_days(0.5)[:3] for m in generate_day(plan, 21)]
    config = MixtureConfig(n_groups=K, n_restarts=2, max_iter=60)
    state, _ = fit_texts([m.text for m in messages], config, seed=3)
    from mixture.routing import route_texts

    groups = route_texts(state, [m.text for m in messages]).group
    votes: dict[int, Counter[str]] = {}
    for g, m in zip(groups.tolist(), messages, strict=True):
        votes.setdefault(g, Counter())[m.theme] += 1
    return state, {g: c.most_common(1)[0][0] for g, c in votes.items()}


def store_model(client: redis.Redis, name: str, fitted, *, checkpoint: bool = True) -> ModelStore:
    state, themes = fitted
    Registry(client).create(name, state.config)
    store = ModelStore(client, name)
    if checkpoint:
        commit(store, state)
    for group, theme in themes.items():
        destination = LOST_FOLDER if theme == "lost_property" else f"Ferry {theme}"
        store.set_group_label(group, theme, destination)
    return store


def commit(store: ModelStore, state: MixtureState) -> None:
    status = WorkerStatus("offline-fit", os.getpid(), "test", time.time(), 0, 0)
    assert store.hold_lease(status)
    store.commit_checkpoint(Checkpoint("offline-fit", store.version(), state, "0-0"))
    store.release_lease("offline-fit")


def invented_mail(n: int, seed: int = 77) -> list[tuple[bytes, str]]:
    """(raw message, theme) of n new invented messages."""
    messages = [m for plan in default_days(0.3)[3:] for m in generate_day(plan, seed)]
    messages = [m for m in messages if m.theme != "junk"][:n]
    return [
        (
            compose(MailDraft(f"{m.id}.{seed}@ferry.invalid", m.text, 1.75e9 + i)).as_bytes(),
            m.theme,
        )
        for i, m in enumerate(messages)
    ]


def config_for(port: int, **changes) -> ImapConfig:
    values = dict(
        host="127.0.0.1",
        port=port,
        user=USER,
        password=PASSWORD,
        security="plain",
        poll_seconds=0.2,
        idle_seconds=5.0,
        backoff_initial=0.05,
        backoff_max=0.5,
        timeout_seconds=10.0,
    )
    values.update(changes)
    return ImapConfig(**values)


def expected_folders(store: ModelStore, mail: list[tuple[bytes, str]], config) -> dict[str, str]:
    state = store.load_state()
    labels = store.group_labels()
    out = {}
    for raw, _ in mail:
        parsed = parse_message(raw)
        decision = decide(
            state, parsed.text, labels, threshold=store.options.review_threshold, unknown_share=0.5
        )
        name = folder_name(decision, prefix=config.folder_prefix, review_folder="Review")
        out[parsed.id] = encode_mailbox(name)
    return out


def assert_filed_once(server: Dovecot, store: ModelStore, expected: dict[str, str]) -> None:
    where: dict[str, list[str]] = {}
    for folder, items in server.everything().items():
        for message_id, _ in items:
            where.setdefault(message_id, []).append(folder)
    assert {m: f for m, f in where.items() if len(f) != 1} == {}  # nothing twice
    assert {m: f[0] for m, f in where.items()} == expected  # every one where it belongs
    stream = store.redis.xrange(store.keys.docs)
    ids = [fields[b"id"].decode() for _, fields in stream]
    assert sorted(ids) == sorted(expected)  # queued for learning exactly once


def test_intake_files_each_message_in_its_group_folder(
    dovecot, redis_client, model_name, fitted, caplog
) -> None:
    store = store_model(redis_client, model_name, fitted)
    mail = invented_mail(40)
    dovecot.append(raw for raw, _ in mail)
    config = config_for(dovecot.port)
    intake = ImapIntake(redis_client, model_name, config)
    with caplog.at_level(logging.INFO, logger="intake.imap"):
        assert intake.run_until_idle() == 40
    expected = expected_folders(store, mail, config)
    assert_filed_once(dovecot, store, expected)
    assert dovecot.message_ids("INBOX") == []
    # the server shows the folder names it was asked to create (RFC 3501 5.1.3 encoding)
    names = {decode_mailbox(f) for f in dovecot.folders()}
    assert set(map(decode_mailbox, expected.values())) <= names
    # quality: the invented themes land mostly in their own group's folder
    themes = {parse_message(raw).id: theme for raw, theme in mail}
    own = sum(
        decode_mailbox(expected[m]) in (f"Ferry {t}", LOST_FOLDER if t == "lost_property" else "")
        for m, t in themes.items()
    )
    reviewed = sum(1 for f in expected.values() if f == "Review")
    assert own + reviewed >= 0.8 * len(mail)  # common practice, no source: 80 % on clean themes
    moves = [r for r in caplog.records if getattr(r, "to_folder", None) and hasattr(r, "uid")]
    assert len(moves) == 40
    assert all(r.message_id and r.from_folder == "INBOX" for r in moves)
    assert not any(PASSWORD in r.getMessage() or PASSWORD in str(vars(r)) for r in caplog.records)
    mark = IntakeMarks(redis_client, model_name, config.label).get()
    assert mark is not None and mark.last_uid == 40
    # a second run finds nothing new
    assert ImapIntake(redis_client, model_name, config).run_until_idle() == 0


def test_keyword_filing_marks_once_and_none_leaves_in_place(
    dovecot, redis_client, model_name, fitted
) -> None:
    store = store_model(redis_client, model_name, fitted)
    mail = invented_mail(12)
    dovecot.append(raw for raw, _ in mail)
    config = config_for(dovecot.port, filing="keyword")
    assert ImapIntake(redis_client, model_name, config).run_until_idle() == 12
    items = dovecot.message_ids("INBOX")
    assert len(items) == 12
    for _, flags in items:
        assert len([f for f in flags if f.startswith("mixroute-")]) == 1
    # the mark lost (as if the crash came before it moved): nothing is marked twice
    redis_client.delete(IntakeMarks(redis_client, model_name, config.label).key)
    assert ImapIntake(redis_client, model_name, config).run_until_idle() == 12
    for _, flags in dovecot.message_ids("INBOX"):
        assert len([f for f in flags if f.startswith("mixroute-")]) == 1
    assert store.stream_info()["length"] == 12
    none = config_for(dovecot.port, filing="none", folder="INBOX")
    dovecot.append([invented_mail(1, seed=5)[0][0]])
    # the same folder's mark: only the new message, queued and left where it is
    assert ImapIntake(redis_client, model_name, none).run_until_idle() == 1
    assert len(dovecot.message_ids("INBOX")) == 13
    assert store.stream_info()["length"] == 13


def test_nothing_filed_before_the_first_checkpoint(dovecot, redis_client, model_name, fitted):
    store = store_model(redis_client, model_name, fitted, checkpoint=False)
    mail = invented_mail(6)
    dovecot.append(raw for raw, _ in mail)
    config = config_for(dovecot.port)
    intake = ImapIntake(redis_client, model_name, config)
    intake.connect()
    assert intake.run_round() == 0 and intake.waiting_for_model
    assert len(dovecot.message_ids("INBOX")) == 6  # left in place
    assert store.stream_info()["length"] == 6  # but queued, so the model can warm up
    commit(store, fitted[0])
    assert intake.run_round() == 6
    intake.close()
    assert_filed_once(dovecot, store, expected_folders(store, mail, config))


def _intake_env(redis_url: str, port: int) -> dict[str, str]:
    env = dict(os.environ)
    env.update(
        REDIS_URL=redis_url,
        MIXROUTE_LOG_FORMAT="json",
        MIXROUTE_INTAKE_IMAP_HOST="127.0.0.1",
        MIXROUTE_INTAKE_IMAP_PORT=str(port),
        MIXROUTE_INTAKE_IMAP_USER=USER,
        MIXROUTE_INTAKE_IMAP_PASSWORD=PASSWORD,
        MIXROUTE_INTAKE_IMAP_SECURITY="plain",
        MIXROUTE_INTAKE_POLL_SECONDS="0.2",
    )
    return env


def test_sigkill_mid_batch_then_restart_files_every_message_once(
    dovecot, redis_client, redis_url, model_name, fitted, tmp_path: Path
) -> None:
    store = store_model(redis_client, model_name, fitted)
    mail = invented_mail(60)
    dovecot.append(raw for raw, _ in mail)
    config = config_for(dovecot.port)
    marks = IntakeMarks(redis_client, model_name, config.label)
    env = _intake_env(redis_url, dovecot.port)
    command = [sys.executable, "-m", "service.cli", "intake", "--model", model_name]
    killed_at = []
    for _ in range(2):  # two kills, each mid-batch
        before = marks.get().last_uid if marks.get() else 0
        log = (tmp_path / f"intake{len(killed_at)}.log").open("wb")
        process = subprocess.Popen(command, env=env, stdout=log, stderr=log)
        wait_until(
            lambda b=before: (m := marks.get()) is not None and m.last_uid >= b + 8,
            timeout=60,
            what="the intake to file some messages",
        )
        process.send_signal(signal.SIGKILL)
        process.wait(10)
        killed_at.append(marks.get().last_uid)
    assert killed_at[-1] < 60, "the kills did not land mid-batch; the test proves nothing"
    done = subprocess.run([*command, "--once"], env=env, capture_output=True, timeout=120)
    assert done.returncode == 0, done.stderr.decode()
    assert marks.get().last_uid == 60
    assert_filed_once(dovecot, store, expected_folders(store, mail, config))


def test_dropped_connections_reconnect_with_backoff_and_lose_nothing(
    dovecot, redis_client, model_name, fitted
) -> None:
    store = store_model(redis_client, model_name, fitted)
    relay = CuttableRelay(dovecot.port)
    mail = invented_mail(45)
    dovecot.append(raw for raw, _ in mail[:30])
    config = config_for(relay.port, use_idle=False, batch=5)
    intake = ImapIntake(redis_client, model_name, config)
    thread = threading.Thread(target=intake.run, daemon=True)
    thread.start()
    try:
        for target in (8, 20):
            wait_until(lambda t=target: intake.filed >= t, timeout=60, what="filing")
            assert relay.cut() >= 1
        dovecot.append(raw for raw, _ in mail[30:])
        # done when the server's inbox is empty (the intake's own count can miss a message
        # moved just before a cut: the restart finds it gone, which is right)
        wait_until(lambda: not dovecot.message_ids("INBOX"), timeout=60, what="an empty inbox")
    finally:
        intake.stop()
        thread.join(30)
        relay.close()
    assert not thread.is_alive()
    assert intake.reconnects >= 2 and relay.accepted >= 3
    assert_filed_once(dovecot, store, expected_folders(store, mail, config))


def test_idle_wakes_the_intake_for_new_mail(dovecot, redis_client, model_name, fitted) -> None:
    store = store_model(redis_client, model_name, fitted)
    # polling would take 10 minutes and so would the IDLE renewal: only the server's EXISTS
    # notice can wake the intake within the wait below
    config = config_for(dovecot.port, poll_seconds=600.0, idle_seconds=600.0)
    intake = ImapIntake(redis_client, model_name, config)
    thread = threading.Thread(target=intake.run, daemon=True)
    thread.start()
    try:
        assert intake.idling.wait(30)
        assert "IDLE" in intake.capabilities
        mail = invented_mail(3)
        dovecot.append(raw for raw, _ in mail)
        wait_until(lambda: intake.filed >= 3, timeout=60, what="IDLE to report the new mail")
    finally:
        intake.stop()
        thread.join(30)
    assert not thread.is_alive()
    assert_filed_once(dovecot, store, expected_folders(store, mail, config))


def test_unreadable_message_is_left_in_place_and_passed(dovecot, redis_client, model_name, fitted):
    store = store_model(redis_client, model_name, fitted)
    mail = invented_mail(3)
    broken = b"Subject: x\r\nContent-Type: text/plain; charset=no-such\r\n\r\nhello\r\n"
    dovecot.append([mail[0][0], broken, mail[1][0], mail[2][0]])
    intake = ImapIntake(redis_client, model_name, config_for(dovecot.port))
    assert intake.run_until_idle() == 4
    assert intake.filed == 3 and intake.unreadable == 1
    assert len(dovecot.message_ids("INBOX")) == 1
    assert store.stream_info()["length"] == 3


# -- without a server ------------------------------------------------------------------------


def test_plain_imap_only_to_loopback_or_when_asked() -> None:
    with pytest.raises(ValueError, match="unencrypted"):
        ImapConfig(host="mail.example.invalid", user="u", password="p", security="plain")
    ImapConfig(host="mail.example.invalid", user="u", password="p", security="plain",
               allow_plain=True)  # fmt: skip
    ImapConfig(host="::1", user="u", password="p", security="plain")
    config = ImapConfig(host="mail.example.invalid", user="u", password="hunter2-secret")
    assert config.effective_port == 993  # TLS by default (RFC 8314 section 3.3: port 993)
    assert "hunter2-secret" not in repr(config) and "hunter2" not in config.label


def test_modified_utf7_mailbox_names_rfc3501_example() -> None:
    # RFC 3501 section 5.1.3: "~peter/mail/台北/日本語" is "~peter/mail/&U,BTFw-/&ZeVnLIqe-"
    assert encode_mailbox("~peter/mail/台北/日本語") == "~peter/mail/&U,BTFw-/&ZeVnLIqe-"
    assert decode_mailbox("~peter/mail/&U,BTFw-/&ZeVnLIqe-") == "~peter/mail/台北/日本語"
    assert encode_mailbox("A&B") == "A&-B" and decode_mailbox("A&-B") == "A&B"


def test_intake_marks_move_forward_only_and_not_into_a_deleted_model(
    redis_client, model_name
) -> None:
    Registry(redis_client).create(model_name, MixtureConfig(n_groups=2))
    marks = IntakeMarks(redis_client, model_name, "u@h:143/INBOX")
    assert marks.get() is None
    marks.reset(7)
    assert marks.advance(7, 5) and not marks.advance(7, 3) and marks.get().last_uid == 5
    with pytest.raises(MarkConflictError):
        marks.advance(8, 9)
    marks.reset(8)
    assert marks.get().uidvalidity == 8 and marks.get().last_uid == 0
    Registry(redis_client).delete(model_name)
    assert marks.get() is None  # deleted with the model
    with pytest.raises(ModelNotFoundError):
        marks.advance(8, 1)


def test_export_and_daily_counts_show_what_the_intake_filed(
    dovecot, redis_client, redis_url, model_name, fitted, tmp_path: Path
) -> None:
    import csv

    import httpx

    from service.app import create_app
    from service.cli import main
    from service.settings import Settings
    from service.testing import uvicorn_thread

    store = store_model(redis_client, model_name, fitted)
    mail = invented_mail(15)
    dovecot.append(raw for raw, _ in mail)
    config = config_for(dovecot.port)
    assert ImapIntake(redis_client, model_name, config).run_until_idle() == 15
    server_side = {
        message_id: decode_mailbox(folder)
        for folder, items in dovecot.everything().items()
        for message_id, _ in items
    }
    with uvicorn_thread(create_app(Settings(redis_url=redis_url))) as url:
        out = tmp_path / "routed.csv"
        args = ["export", "--api", url, "--model", model_name, "--out", str(out)]
        assert main(args) == 0
        daily = httpx.get(f"{url}/models/{model_name}/routed/daily", params={"days": 3}).json()
        lines = tmp_path / "routed.jsonl"
        args = [
            "export",
            "--api",
            url,
            "--model",
            model_name,
            "--format",
            "jsonl",
            "-o",
            str(lines),
        ]
        assert main(args) == 0
    rows = list(csv.DictReader(out.open()))
    assert [r["id"] for r in rows] == [parse_message(raw).id for raw, _ in mail]
    assert {r["id"]: r["filed_to"] for r in rows} == server_side  # as the IMAP server says
    labels = store.group_labels()
    for row in rows:
        assert row["label"] == labels[int(row["group"])].label
        assert 0.0 < float(row["posterior"]) <= 1.0 and row["review"] in ("True", "False")
        assert (row["filed_to"] == "Review") == (row["review"] == "True")
    assert len(lines.read_text().splitlines()) == 15
    today = list(daily["days"])[-1]
    assert list(daily["days"]) == sorted(daily["days"]) and len(daily["days"]) == 3
    assert daily["days"][today] == {
        str(g): n for g, n in sorted(Counter(int(r["group"]) for r in rows).items())
    }


def test_a_new_uidvalidity_starts_the_folder_over(dovecot, redis_client, model_name, fitted):
    store = store_model(redis_client, model_name, fitted)
    mail = invented_mail(5)
    dovecot.append(raw for raw, _ in mail)
    config = config_for(dovecot.port)
    marks = IntakeMarks(redis_client, model_name, config.label)
    # a mark left by the folder's previous numbering (RFC 3501 2.3.1.1: UIDs of another
    # UIDVALIDITY mean nothing now), far above every current UID
    marks.reset(1)
    marks.advance(1, 999)
    assert ImapIntake(redis_client, model_name, config).run_until_idle() == 5
    assert_filed_once(dovecot, store, expected_folders(store, mail, config))
    assert marks.get().uidvalidity != 1 and marks.get().last_uid == 5


class _NoMoveIntake(ImapIntake):
    """A server without MOVE (RFC 6851): COPY, then flag deleted and expunge."""

    fail_first_delete = True

    def connect(self) -> None:
        super().connect()
        self.capabilities = self.capabilities - {"MOVE"}
        conn, intake = self.conn, self
        real_uid = conn.uid

        def uid(command, *args):
            if command == "STORE" and "Deleted" in args[-1] and intake.fail_first_delete:
                intake.fail_first_delete = False
                raise OSError("connection lost between COPY and delete (simulated)")
            return real_uid(command, *args)

        conn.uid = uid


def test_without_move_a_crash_between_copy_and_delete_copies_once(
    dovecot, redis_client, model_name, fitted
) -> None:
    store = store_model(redis_client, model_name, fitted)
    mail = invented_mail(6)
    dovecot.append(raw for raw, _ in mail)
    config = config_for(dovecot.port)
    intake = _NoMoveIntake(redis_client, model_name, config)
    with pytest.raises(OSError, match="simulated"):
        intake.run_until_idle()
    assert len(dovecot.message_ids("INBOX")) == 6  # the first one copied, not yet deleted
    again = _NoMoveIntake(redis_client, model_name, config)
    again.fail_first_delete = False
    assert again.run_until_idle() == 6
    assert_filed_once(dovecot, store, expected_folders(store, mail, config))


def test_redis_away_files_nothing_then_everything_once(dovecot, tmp_path, fitted) -> None:
    from state.connection import EmbeddedRedis

    server = EmbeddedRedis(tmp_path / "redis", appendfsync="always").start()
    client = server.client(socket_timeout=2)
    try:
        store = store_model(client, "away", fitted)
        mail = invented_mail(20)
        dovecot.append(raw for raw, _ in mail[:10])
        config = config_for(dovecot.port, use_idle=False)
        intake = ImapIntake(client, "away", config)
        thread = threading.Thread(target=intake.run, daemon=True)
        thread.start()
        try:
            wait_until(lambda: not dovecot.message_ids("INBOX"), timeout=60, what="first ten")
            server.stop()
            dovecot.append(raw for raw, _ in mail[10:])
            wait_until(lambda: intake.reconnects >= 2, timeout=60, what="failed rounds")
            assert len(dovecot.message_ids("INBOX")) == 10  # nothing filed without Redis
            server.start()
            wait_until(lambda: not dovecot.message_ids("INBOX"), timeout=60, what="the rest")
        finally:
            intake.stop()
            thread.join(30)
        assert_filed_once(dovecot, store, expected_folders(store, mail, config))
    finally:
        client.close()
        server.stop()


def test_tls_by_default_checks_the_server_certificate(redis_client, model_name, fitted) -> None:
    server = Dovecot(tls=True).start()
    try:
        store = store_model(redis_client, model_name, fitted)
        mail = invented_mail(4)
        server.append(raw for raw, _ in mail)
        values = dict(host="127.0.0.1", port=server.port, user=USER, password=PASSWORD)
        untrusted = ImapConfig(**values)  # security="tls" is the default
        with pytest.raises(ssl.SSLCertVerificationError):
            ImapIntake(redis_client, model_name, untrusted).run_until_idle()
        assert len(server.message_ids("INBOX")) == 4
        trusted = ImapConfig(**values, ca_file=str(server.cert))
        assert ImapIntake(redis_client, model_name, trusted).run_until_idle() == 4
        assert_filed_once(server, store, expected_folders(store, mail, trusted))
    finally:
        server.stop()


def test_intake_settings_password_file_and_one_line_errors(tmp_path, monkeypatch, capsys) -> None:
    from service.cli import main
    from service.intake_command import imap_config_from_settings
    from service.settings import IntakeSettings

    secret = tmp_path / "imap-password"
    secret.write_text("from-a-file-secret\n")
    monkeypatch.setenv("MIXROUTE_INTAKE_IMAP_HOST", "127.0.0.1")
    monkeypatch.setenv("MIXROUTE_INTAKE_IMAP_USER", "ferry")
    monkeypatch.setenv("MIXROUTE_INTAKE_IMAP_PASSWORD", "from-the-variable")
    monkeypatch.setenv("MIXROUTE_INTAKE_IMAP_PASSWORD_FILE", str(secret))
    config = imap_config_from_settings(IntakeSettings(), 0.5)
    assert config.password == "from-a-file-secret" and config.security == "tls"
    monkeypatch.delenv("REDIS_URL", raising=False)
    monkeypatch.delenv("MIXROUTE_REDIS_URL", raising=False)
    assert main(["intake"]) == 2
    err = capsys.readouterr().err
    assert "needs the model's Redis" in err and "Traceback" not in err
