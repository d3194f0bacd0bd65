"""Run every benchmark: each ``bench/bench_*.py`` module's ``main()``, in name order."""

from __future__ import annotations

import importlib
import pkgutil

import bench


def main() -> None:
    """Import each ``bench.bench_*`` module and call its ``main()`` with default settings."""
    names = sorted(
        m.name for m in pkgutil.iter_modules(bench.__path__) if m.name.startswith("bench_")
    )
    for name in names:
        print(f"== bench.{name}", flush=True)
        importlib.import_module(f"bench.{name}").main()
        print(flush=True)


if __name__ == "__main__":
    main()
