"""The example JSON-lines file of the repository, ``examples/ferry-inbox.jsonl``: INVENTED.

It is one day of the demo's invented passenger inbox (service/demo_data.py), small enough to
read, written so that ``python -m service.examples`` makes the same file again and a test can
check that it has not been edited by hand. Every record carries ``"invented": true``; the
command line reads ``id`` and ``text`` and ignores the other fields.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path

from service.demo_data import default_days, generate_day

EXAMPLE_PATH = Path(__file__).resolve().parent.parent / "examples" / "ferry-inbox.jsonl"
EXAMPLE_SCALE = 0.1  # 60 messages of day 1
EXAMPLE_SEED = 2


def example_lines() -> str:
    """The example file's text: one JSON object a line."""
    plan = default_days(EXAMPLE_SCALE)[0]
    records = [
        {**message.to_json(), "invented": True} for message in generate_day(plan, EXAMPLE_SEED)
    ]
    return "".join(json.dumps(record, ensure_ascii=False) + "\n" for record in records)


def main() -> int:
    """Write the example file (or to the path given as the only argument)."""
    path = Path(sys.argv[1]) if len(sys.argv) > 1 else EXAMPLE_PATH
    path.write_text(example_lines(), encoding="utf-8")
    print(f"wrote {path}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
