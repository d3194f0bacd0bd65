"""Corrections from the mailbox: a message an operator moves by hand from the review folder (or
from one group's folder) into a group's destination folder becomes a correction to that group,
once. Against a real IMAP server (dovecot, started by the tests; tests/imap_support.py) and the
session's Redis; the messages are invented ferry mail (service.demo_data)."""

from __future__ import annotations

import imaplib

import pytest

from intake.compose import MailDraft, compose
from intake.folders import encode_mailbox
from intake.imap import ImapIntake
from intake.message import parse_message
from state.registry import Registry
from state.store import ModelStore
from state.stream import Labelled, decode_entry
from tests.imap_support import Dovecot, dovecot_missing
from tests.test_intake_imap import commit, config_for, fitted, invented_mail  # noqa: F401 (fixture)

pytestmark = [
    pytest.mark.redis,
    pytest.mark.skipif(dovecot_missing() is not None, reason=str(dovecot_missing())),
]


@pytest.fixture
def dovecot():
    server = Dovecot().start()
    yield server
    server.stop()


def corrections(store: ModelStore) -> list[Labelled]:
    entries = [decode_entry(s.decode(), f) for s, f in store.redis.xrange(store.keys.docs)]
    return [e for e in entries if isinstance(e, Labelled)]


def move(conn: imaplib.IMAP4, source: str, message_id: str, target: str) -> None:
    """What an operator's mail program does: UID MOVE one message, found by Message-ID."""
    assert conn.select(f'"{source}"')[0] == "OK"
    _, data = conn.uid("SEARCH", "HEADER", "Message-ID", f'"{message_id}"')
    (uid,) = data[0].split()
    assert conn.uid("MOVE", uid, f'"{target}"')[0] == "OK"


def test_hand_moves_into_a_group_folder_become_corrections_once(
    dovecot,
    redis_client,
    model_name,
    fitted,  # noqa: F811 (the fixture of tests/test_intake_imap.py)
) -> None:
    state, themes = fitted
    Registry(redis_client).create(model_name, state.config)
    store = ModelStore(redis_client, model_name)
    commit(store, state)
    groups = sorted(themes)
    for group in groups:
        store.set_group_label(group, themes[group], f"Ferry {group}")
    mail = invented_mail(30)
    # one the model cannot route (no known word): the intake sends it to review
    odd = compose(MailDraft("odd-1@ferry.invalid", "zorbly quantix flimmerwex", 1.76e9))
    mail.append((odd.as_bytes(), "unknown"))
    dovecot.append(raw for raw, _ in mail)
    config = config_for(dovecot.port)
    assert ImapIntake(redis_client, model_name, config).run_until_idle() == 31
    everything = dovecot.everything()
    reviewed = [m for m, _ in everything.get("Review", [])]
    filed = {f: [m for m, _ in items] for f, items in everything.items() if f.startswith("Ferry")}
    assert reviewed and filed, (list(everything), len(reviewed))
    assert corrections(store) == []  # the intake's own filing is no correction
    # the operator moves one reviewed message to group a's folder, and one filed message from
    # its folder to another group's
    a = groups[0]
    moved_from_review = reviewed[0]
    source_folder = sorted(filed)[0]
    reassigned = filed[source_folder][0]
    b = next(g for g in groups if f"Ferry {g}" != source_folder and g != a)
    conn = dovecot.client()
    try:
        move(conn, "Review", moved_from_review, encode_mailbox(f"Ferry {a}"))
        move(conn, source_folder, reassigned, encode_mailbox(f"Ferry {b}"))
    finally:
        conn.logout()
    intake = ImapIntake(redis_client, model_name, config)
    assert intake.run_until_idle() == 0  # nothing new in the inbox; the hand moves are read
    assert intake.corrections == 2
    found = {(c.target, c.group, c.source) for c in corrections(store)}
    assert found == {(moved_from_review, a, "correction"), (reassigned, b, "correction")}
    texts = {parse_message(raw).id: parse_message(raw).text for raw, _ in mail}
    assert {c.target: c.text for c in corrections(store)} == {
        moved_from_review: texts[moved_from_review],
        reassigned: texts[reassigned],
    }
    # taken once: another pass finds nothing more, and the messages stay where they were put
    again = ImapIntake(redis_client, model_name, config)
    again.run_until_idle()
    assert again.corrections == 0 and len(corrections(store)) == 2
    assert moved_from_review in [m for m, _ in dovecot.message_ids(encode_mailbox(f"Ferry {a}"))]
