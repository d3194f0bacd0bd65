"""Quoted replies and signatures cut from a plain-text mail body.

They repeat the other side's words (or the sender's fixed footer), so learning from them would
tie a message to the one it answers instead of to its own content.

* Quoted lines start with ``>`` (RFC 3676 section 4.5 calls it the quote indicator); the
  attribution line that introduces them ("On <date>, <name> wrote:") goes with them.
* A signature starts at the separator line ``-- `` (dash, dash, space; RFC 3676 section 4.3).
  Many clients trim the trailing space, so a line of exactly ``--`` counts too (common
  practice, no source).
* Clients that quote by copying the original below a ruler ("-----Original Message-----", or a
  header block "From: ... Sent: ...") lose everything from the ruler on.
"""

from __future__ import annotations

import re

_ATTRIBUTION = re.compile(r"^\s*(on\b.{0,300}\bwrote|.{0,200}\bwrote)\s*:\s*$", re.IGNORECASE)
_RULER = re.compile(r"^\s*-{2,}\s*(original message|forwarded message)\s*-{2,}\s*$", re.I)
_OUTLOOK_FROM = re.compile(r"^\s*from:\s.+$", re.IGNORECASE)
_OUTLOOK_NEXT = re.compile(r"^\s*(sent|date|to|subject):\s", re.IGNORECASE)


def strip_replies(text: str) -> str:
    """Remove quoted lines, their attribution line, and a trailing signature.

    Parameters
    ----------
    text : str
        A plain-text body.

    Returns
    -------
    str
        The sender's own words; blank lines at either end trimmed. When nothing but quotes
        and signature is left, the result is empty (the caller decides what that means).
    """
    lines = text.splitlines()
    kept: list[str] = []
    for index, line in enumerate(lines):
        if line.rstrip() == "--" or line == "-- ":
            break
        if _RULER.match(line):
            break
        if (
            _OUTLOOK_FROM.match(line)
            and index + 1 < len(lines)
            and _OUTLOOK_NEXT.match(lines[index + 1])
        ):
            break
        if line.lstrip().startswith(">"):
            # an attribution line just before the quote (blank lines between allowed)
            while kept and not kept[-1].strip():
                kept.pop()
            if kept and _ATTRIBUTION.match(kept[-1]):
                kept.pop()
            continue
        kept.append(line)
    while kept and (not kept[-1].strip() or _ATTRIBUTION.match(kept[-1])):
        kept.pop()
    return "\n".join(kept).strip()
