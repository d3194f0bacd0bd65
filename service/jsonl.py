"""JSON-lines reading moved to :mod:`intake.jsonl` (mail and files in); kept as a re-export."""

from intake.jsonl import JsonlBatch, JsonlDocument, JsonlProblem, iter_lines, parse_line, read_jsonl

__all__ = ["JsonlBatch", "JsonlDocument", "JsonlProblem", "iter_lines", "parse_line", "read_jsonl"]
