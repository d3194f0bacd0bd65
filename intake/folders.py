"""Folder names and keywords on the wire (RFC 3501).

Mailbox names with characters outside printable ASCII travel in modified UTF-7 (RFC 3501
section 5.1.3): ``&`` starts a base64 run of UTF-16BE in which ``,`` replaces ``/``, ``-``
ends it, and ``&-`` is a literal ampersand. Names are sent as quoted strings.
"""

from __future__ import annotations

import base64
import re

_ATOM_SPECIALS = re.compile(r'[\x00-\x20\x7f(){%*"\\\]]')


def encode_mailbox(name: str) -> str:
    """A mailbox name in IMAP's modified UTF-7."""
    out: list[str] = []
    run: list[str] = []

    def flush() -> None:
        if run:
            data = "".join(run).encode("utf-16-be")
            out.append("&" + base64.b64encode(data).decode().rstrip("=").replace("/", ",") + "-")
            run.clear()

    for char in name:
        if 0x20 <= ord(char) <= 0x7E:
            flush()
            out.append("&-" if char == "&" else char)
        else:
            run.append(char)
    flush()
    return "".join(out)


def decode_mailbox(name: str) -> str:
    """The inverse of :func:`encode_mailbox`."""
    out: list[str] = []
    i = 0
    while i < len(name):
        if name[i] != "&":
            out.append(name[i])
            i += 1
            continue
        end = name.index("-", i)
        chunk = name[i + 1 : end]
        if not chunk:
            out.append("&")
        else:
            padded = chunk.replace(",", "/") + "=" * (-len(chunk) % 4)
            out.append(base64.b64decode(padded).decode("utf-16-be"))
        i = end + 1
    return "".join(out)


def quote_mailbox(name: str) -> str:
    """The encoded name as an IMAP quoted string (backslash and double quote escaped)."""
    encoded = encode_mailbox(name)
    return '"' + encoded.replace("\\", "\\\\").replace('"', '\\"') + '"'


def keyword(prefix: str, name: str) -> str:
    """An IMAP keyword (an atom) for a destination name: specials and spaces become ``_``."""
    text = (prefix + name).encode("ascii", "replace").decode()
    return _ATOM_SPECIALS.sub("_", text).replace("?", "_")[:100] or "mixroute"
