"""Documents written as mail: one RFC 5322 message per document, into an mbox or a Maildir.

Used by the demo generator (the invented ferry inbox as mail files) and by tests. The subject
is the text's first sentence (or line), the body the rest, so reading the mail back gives the
same words as the text.
"""

from __future__ import annotations

import mailbox
import re
from collections.abc import Iterable
from dataclasses import dataclass
from datetime import UTC, datetime
from email.message import EmailMessage
from email.utils import format_datetime
from pathlib import Path

_FIRST_SENTENCE = re.compile(r"^(.{1,200}?[.!?])\s+(.+)$", re.DOTALL)


@dataclass(frozen=True)
class MailDraft:
    """What one message is made of."""

    id: str
    text: str
    received: float
    sender: str = "passenger@example.invalid"
    to: str = "inbox@example.invalid"
    extra_headers: tuple[tuple[str, str], ...] = ()


def split_subject(text: str) -> tuple[str, str]:
    """Subject and body of a text: its first line when it has several, else its first sentence
    (the whole text as the subject when it is one sentence)."""
    first, sep, rest = text.strip().partition("\n")
    if sep and rest.strip():
        return first.strip(), rest.strip()
    match = _FIRST_SENTENCE.match(first.strip())
    if match:
        return match.group(1).strip(), match.group(2).strip()
    return first.strip(), ""


def compose(draft: MailDraft) -> EmailMessage:
    """One message: From, To, Subject, Date, Message-ID and a UTF-8 text/plain body."""
    subject, body = split_subject(draft.text)
    message = EmailMessage()
    message["From"] = draft.sender
    message["To"] = draft.to
    message["Subject"] = subject
    message["Date"] = format_datetime(datetime.fromtimestamp(draft.received, tz=UTC))
    message["Message-ID"] = f"<{draft.id}>"
    for name, value in draft.extra_headers:
        message[name] = value
    message.set_content(body + "\n" if body else "\n")
    return message


def write_mbox(path: str | Path, drafts: Iterable[MailDraft]) -> int:
    """Write the drafts as a new mbox file (replacing one at ``path``); the count written."""
    path = Path(path)
    path.unlink(missing_ok=True)
    box = mailbox.mbox(path, create=True)
    count = 0
    try:
        box.lock()
        for draft in drafts:
            box.add(compose(draft))
            count += 1
        box.flush()
    finally:
        box.unlock()
        box.close()
    return count


def write_maildir(path: str | Path, drafts: Iterable[MailDraft]) -> int:
    """Add the drafts to a Maildir at ``path`` (created when missing); the count written."""
    box = mailbox.Maildir(Path(path), factory=None, create=True)
    count = 0
    for draft in drafts:
        box.add(compose(draft))
        count += 1
    return count
