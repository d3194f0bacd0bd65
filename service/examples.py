"""The example files of the repository, ``examples/ferry-inbox.jsonl`` and
``examples/ferry-seeds.jsonl``: INVENTED.

The inbox is one day of the demo's invented passenger inbox (service/demo_data.py), small
enough to read; the seeds file starts three groups from a few invented example messages each
(``mixroute fit --seeds``). Both are written so that ``python -m service.examples`` makes the
same files again and a test can check that they have not been edited by hand. Every record
carries ``"invented": true``; the command line ignores fields it does not read.
"""

from __future__ import annotations

import json
import random
import sys
from pathlib import Path

from service.demo_data import THEMES, compose_message, default_days, generate_day

EXAMPLE_PATH = Path(__file__).resolve().parent.parent / "examples" / "ferry-inbox.jsonl"
SEEDS_PATH = EXAMPLE_PATH.with_name("ferry-seeds.jsonl")
# Seeded themes, their invented destinations, and examples per seed.
SEED_THEMES = {
    "lost_property": "lost-property@ferry.example.invalid",
    "pets": "animals-desk@ferry.example.invalid",
    "vehicles": "freight@ferry.example.invalid",
}
SEED_EXAMPLES = 4
SEEDS_SEED = 7
EXAMPLE_SCALE = 0.1  # 60 messages of day 1
EXAMPLE_SEED = 2


def example_lines() -> str:
    """The example file's text: one JSON object a line."""
    plan = default_days(EXAMPLE_SCALE)[0]
    records = [
        {**message.to_json(), "invented": True} for message in generate_day(plan, EXAMPLE_SEED)
    ]
    return "".join(json.dumps(record, ensure_ascii=False) + "\n" for record in records)


def seed_lines() -> str:
    """The seeds file's text: one ``{"label", "destination", "examples"}`` object a line."""
    rng = random.Random(SEEDS_SEED)
    themes = {theme.name: theme for theme in THEMES}
    records = [
        {
            "label": themes[name].title,
            "destination": destination,
            "examples": [compose_message(themes[name], rng) for _ in range(SEED_EXAMPLES)],
            "invented": True,
        }
        for name, destination in SEED_THEMES.items()
    ]
    return "".join(json.dumps(record, ensure_ascii=False) + "\n" for record in records)


def main() -> int:
    """Write the example files (the inbox to the path given as the only argument, if any)."""
    path = Path(sys.argv[1]) if len(sys.argv) > 1 else EXAMPLE_PATH
    path.write_text(example_lines(), encoding="utf-8")
    print(f"wrote {path}")
    if len(sys.argv) <= 1:
        SEEDS_PATH.write_text(seed_lines(), encoding="utf-8")
        print(f"wrote {SEEDS_PATH}")
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
