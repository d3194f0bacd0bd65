"""JSON-lines reading moved to :mod:`intake.jsonl` (mail and files in); kept as a re-export."""

from intake.jsonl import iter_lines, parse_line

__all__ = ["iter_lines", "parse_line"]
