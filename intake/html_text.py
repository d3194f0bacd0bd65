"""HTML mail bodies turned into plain text with the standard library's HTML parser."""

from __future__ import annotations

import re
from html.parser import HTMLParser

# Elements whose content is never text a reader sees.
_HIDDEN = frozenset({"script", "style", "head", "title", "template", "noscript"})
# Elements that end a line of text when they open or close.
_BLOCK = frozenset(
    {
        "address", "article", "aside", "blockquote", "br", "dd", "div", "dl", "dt", "footer",
        "form", "h1", "h2", "h3", "h4", "h5", "h6", "header", "hr", "li", "main", "nav", "ol",
        "p", "pre", "section", "table", "td", "th", "tr", "ul",
    }
)  # fmt: skip
_VOID = frozenset({"br", "hr", "img", "meta", "link", "input", "area", "base", "col", "wbr"})
_SPACES = re.compile(r"[ \t\r\f\v\u00a0]+")


class _TextCollector(HTMLParser):
    def __init__(self, drop_quotes: bool) -> None:
        super().__init__(convert_charrefs=True)
        self.drop_quotes = drop_quotes
        self.parts: list[str] = []
        self.hidden = 0
        self.quoted = 0

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag in _VOID:
            if tag in _BLOCK:
                self.parts.append("\n")
            return
        if tag in _HIDDEN:
            self.hidden += 1
        elif tag == "blockquote" or (tag == "div" and _is_quote_div(attrs)):
            # a nested <div> inside the quote counts too, so the depth is per open element
            self.quoted += 1
        elif self.quoted:
            self.quoted += 1
        if tag in _BLOCK:
            self.parts.append("\n")

    def handle_endtag(self, tag: str) -> None:
        if tag in _VOID:
            return
        if tag in _HIDDEN:
            self.hidden = max(0, self.hidden - 1)
        elif self.quoted:
            self.quoted -= 1
        if tag in _BLOCK:
            self.parts.append("\n")

    def handle_data(self, data: str) -> None:
        if self.hidden or (self.drop_quotes and self.quoted):
            return
        self.parts.append(data)


def _is_quote_div(attrs: list[tuple[str, str | None]]) -> bool:
    # webmail wraps the quoted earlier message in a <div class="..._quote">
    classes = " ".join(value or "" for name, value in attrs if name == "class")
    return "_quote" in classes or classes.startswith("quote")


def html_to_text(html: str, *, drop_quotes: bool = False) -> str:
    """The visible text of an HTML document, one line per block element.

    Parameters
    ----------
    html : str
        The markup (a whole document or a fragment; unbalanced tags are tolerated).
    drop_quotes : bool
        Leave out ``<blockquote>`` content and webmail quote wrappers (quoted replies).

    Returns
    -------
    str
        Text with character references decoded, runs of spaces collapsed, no blank lines.
    """
    collector = _TextCollector(drop_quotes)
    collector.feed(html)
    collector.close()
    lines = (_SPACES.sub(" ", line).strip() for line in "".join(collector.parts).split("\n"))
    return "\n".join(line for line in lines if line)
