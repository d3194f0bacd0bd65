"""`mixroute demo` end to end (embedded Redis, API, worker) at half scale: the storm day raises a
drift alert, the junk burst is snapshotted around and rolled back with replay, and the run
stops cleanly with every header marking the data as invented."""

from __future__ import annotations

import io

import pytest

from service.demo import run_demo
from service.demo_data import INVENTED_NOTICE

pytestmark = pytest.mark.redis


def test_demo_runs_and_tells_the_story() -> None:
    out = io.StringIO()
    assert run_demo(scale=0.5, seed=0, out=out) == 0
    text = out.getvalue()
    lines = text.splitlines()
    assert lines[0] == INVENTED_NOTICE and lines[-1] == INVENTED_NOTICE
    storm = next(i for i, line in enumerate(lines) if "STORM" in line)
    junk = next(i for i, line in enumerate(lines) if "junk burst arrives" in line)
    # the drift alert is printed right after the storm day, before the junk day
    assert any("DRIFT ALERT" in line for line in lines[storm + 1 : junk])
    snapshot = next(i for i, line in enumerate(lines) if "'before the junk burst'" in line)
    assert storm < snapshot < junk
    assert "groups now holding junk" in text
    assert "replay=true  skip " in text and "kept as safety snapshot" in text
    assert "festival weekend" in text.split("rollback:")[1]
    assert "purity" in text and "REVIEW (" in text
    assert "stopped API, worker and Redis" in text
