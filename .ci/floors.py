"""Print pip constraints pinning every ``name>=floor`` requirement of pyproject.toml to its floor.

Usage: ``python .ci/floors.py [extra ...] > constraints.txt``. The runtime dependencies are
always included; each named optional-dependency group (e.g. ``dev``) adds its own.
"""

from __future__ import annotations

import re
import sys
import tomllib
from pathlib import Path

FLOOR = re.compile(r"^\s*([A-Za-z0-9][A-Za-z0-9._-]*)\s*(?:\[[^\]]*\])?\s*>=\s*([^,;\s]+)")


def floors(pyproject: Path, extras: list[str]) -> dict[str, str]:
    """Lower bound of each requirement that has one, by distribution name."""
    project = tomllib.loads(pyproject.read_text())["project"]
    requirements = list(project["dependencies"])
    for extra in extras:
        requirements += project["optional-dependencies"][extra]
    found: dict[str, str] = {}
    for requirement in requirements:
        match = FLOOR.match(requirement)
        if match:
            found[match.group(1).lower()] = match.group(2)
    return found


def main() -> None:
    root = Path(__file__).resolve().parent.parent
    for name, version in sorted(floors(root / "pyproject.toml", sys.argv[1:]).items()):
        print(f"{name}=={version}")


if __name__ == "__main__":
    main()
