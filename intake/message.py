"""One RFC 5322 message turned into a document: id, text, received time and metadata.

Parsing uses the standard library's ``email`` package with its modern policy
(``email.policy.default``): encoded words in headers (RFC 2047) and body charsets and
transfer encodings (quoted-printable, base64) are decoded by it.

* text: the subject, a blank line, then the body: text/plain preferred, else text/html turned
  into text; quoted replies and the signature are cut by default (:mod:`intake.quotes`);
* attachments (any part that is not the chosen body or its alternative) are skipped and
  counted;
* id: the Message-ID without its angle brackets, else ``sha256:`` and the first 24 hex digits
  of the raw bytes' hash (the same message read twice gets the same id);
* received: the Date header as unix seconds (None when absent or unreadable; a date without a
  zone is read as UTC);
* metadata: ``sender_domain`` (lower case) when the From header has an address, and
  ``attachments_skipped`` when there were any. The sender's address is metadata, never words.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field
from datetime import UTC
from email import policy
from email.message import EmailMessage, Message
from email.parser import BytesParser
from typing import Any

from intake.html_text import html_to_text
from intake.quotes import strip_replies

_PARSER = BytesParser(policy=policy.default)
# Header names that only a mail message starts with (a file starting so is a message).
MAIL_HEADERS = frozenset(
    {
        "from", "to", "cc", "subject", "date", "message-id", "received", "return-path",
        "delivered-to", "mime-version", "reply-to", "sender", "in-reply-to", "references",
        "x-mailer", "content-type", "dkim-signature", "authentication-results", "user-agent",
        "resent-from", "resent-to", "resent-date", "resent-message-id", "resent-sender",
    }
)  # fmt: skip


class MessageError(ValueError):
    """A message that cannot be turned into a document; the text says why."""


@dataclass(frozen=True)
class MailDocument:
    """What one message gives: the document and what was left out."""

    id: str
    text: str
    received: float | None
    metadata: dict[str, Any] = field(default_factory=dict)
    attachments_skipped: int = 0
    subject: str = ""


def parse_message(raw: bytes, *, strip_quotes: bool = True) -> MailDocument:
    """Turn the raw bytes of one message into a :class:`MailDocument`.

    Parameters
    ----------
    raw : bytes
        The message as stored (headers, blank line, body).
    strip_quotes : bool
        Cut quoted replies and the signature from the body.

    Returns
    -------
    MailDocument

    Raises
    ------
    MessageError
        When the bytes have no header section, a body part's charset is unknown, or neither
        the subject nor the body has any text.
    """
    if not raw.strip():
        raise MessageError("empty message")
    message = _PARSER.parsebytes(raw)
    if not isinstance(message, EmailMessage) or not message.keys():
        raise MessageError("no header section (not an RFC 5322 message)")
    if not any(name.lower() in MAIL_HEADERS for name in message):
        raise MessageError("no mail header (From, Subject, Date, Message-ID, ...)")
    subject = _header_text(message, "subject")
    body_part = message.get_body(preferencelist=("plain", "html"))
    body = ""
    if body_part is not None:
        content = _decoded_text(body_part)
        if body_part.get_content_subtype() == "html":
            body = html_to_text(content, drop_quotes=strip_quotes)
        else:
            body = content.replace("\r\n", "\n")
        if strip_quotes:
            body = strip_replies(body)
        body = body.strip()
    text = f"{subject}\n\n{body}" if subject and body else (subject or body)
    if not text.strip():
        raise MessageError("no text: the subject and the body are empty")
    attachments = _count_attachments(message, body_part)
    metadata: dict[str, Any] = {}
    domain = _sender_domain(message)
    if domain:
        metadata["sender_domain"] = domain
    if attachments:
        metadata["attachments_skipped"] = attachments
    return MailDocument(
        id=message_id(message, raw),
        text=text,
        received=_received(message),
        metadata=metadata,
        attachments_skipped=attachments,
        subject=subject,
    )


def message_id(message: Message, raw: bytes) -> str:
    """The Message-ID without angle brackets, or a hash of the raw bytes when there is none."""
    value = _header_text(message, "message-id").strip()
    if value.startswith("<") and value.endswith(">"):
        value = value[1:-1].strip()
    if value and len(value) <= 200 and not any(c.isspace() for c in value):
        return value
    return "sha256:" + hashlib.sha256(raw).hexdigest()[:24]


def _header_text(message: Message, name: str) -> str:
    try:
        value = message.get(name)
    except (ValueError, IndexError, TypeError):  # a header the policy cannot parse
        value = None
    if value is None:
        return ""
    # folded headers keep their line breaks in str(); words are what matter
    return " ".join(str(value).split())


def _decoded_text(part: Message) -> str:
    try:
        content = part.get_content()  # type: ignore[attr-defined]
    except LookupError:
        raise MessageError(f"unknown charset {part.get_content_charset()!r}") from None
    if isinstance(content, bytes):  # pragma: no cover - text parts give str
        content = content.decode("utf-8", errors="replace")
    return str(content)


def _count_attachments(message: EmailMessage, body_part: Message | None) -> int:
    count = 0
    for part in message.walk():
        if part.is_multipart() or part is body_part:
            continue
        if part.get_content_maintype() == "message":
            continue
        if part.is_attachment():  # type: ignore[attr-defined]
            count += 1
        elif part.get_content_maintype() != "text":
            count += 1  # inline images, calendars, ... : not words
    return count


def _sender_domain(message: Message) -> str | None:
    try:
        header = message.get("from")
        addresses = getattr(header, "addresses", ()) if header is not None else ()
    except (ValueError, IndexError, TypeError):
        return None
    for address in addresses:
        domain = str(address.domain or "").strip().lower()
        if domain:
            return domain
    return None


def _received(message: Message) -> float | None:
    try:
        header = message.get("date")
        moment = getattr(header, "datetime", None) if header is not None else None
    except (ValueError, IndexError, TypeError, OverflowError):
        return None
    if moment is None:
        return None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    try:
        return float(moment.timestamp())
    except (OverflowError, OSError, ValueError):
        return None
