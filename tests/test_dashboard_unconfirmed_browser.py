"""The dashboard's restore when the replicas do not confirm (MIXROUTE_REDIS_WAIT_REPLICAS on a
Redis without replicas, a private one of this module), in headless Chromium: the API answers
503 with ``written: true``, since the rollback is done on the primary; the page says it
restored and that the replicas have not confirmed it, and shows the new version, instead of
"Restore failed". Screenshot to artefacts/."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from service.testing import free_port, uvicorn_thread, wait_until
from state.connection import EmbeddedRedis
from state.replicas import require_replicas
from tests.ops_support import ADMIN, make_app, train
from tests.test_dashboard_browser import (  # noqa: F401
    ARTEFACTS,
    browser,
    open_as_admin,
    shown_version,
)

pytestmark = [pytest.mark.browser, pytest.mark.redis]
MODEL = "unconfirmed"


@pytest.fixture
def served(tmp_path: Path) -> Iterator[tuple[str, httpx.Client]]:
    """The API (admin key, one in-process worker) on a private Redis without replicas; the
    process's replica requirement back to none afterwards."""
    server = EmbeddedRedis(tmp_path / "redis", port=free_port(), appendfsync="no").start()
    try:
        app = make_app(server.url, MODEL)
        with uvicorn_thread(app) as base, httpx.Client(base_url=base, headers=ADMIN) as api:
            yield base, api
    finally:
        require_replicas(0)
        server.stop()


def test_an_unconfirmed_restore_is_shown_as_done_and_unconfirmed(
    served: tuple[str, httpx.Client],
    browser: Any,  # noqa: F811 - the browser fixture of the dashboard tests
) -> None:
    from selenium.webdriver.common.by import By

    base, api = served
    model = MODEL
    train(api, model, days=2, snapshot_after=1)
    open_as_admin(browser, base, model)
    before = api.get(f"/models/{model}").json()["version"]
    snapshot = api.get(f"/models/{model}/snapshots").json()["snapshots"][0]

    require_replicas(1, 0.05)  # from here every write waits for a replica it lacks
    browser.find_element(
        By.CSS_SELECTOR, f"button.restore[data-snapshot='{snapshot['id']}']"
    ).click()
    dialog = browser.find_element(By.ID, "confirm-dialog")
    wait_until(dialog.is_displayed, 10, what="confirmation dialog")
    browser.find_element(By.ID, "confirm-restore").click()
    toast = browser.find_element(By.ID, "toast")
    wait_until(lambda: "replicas" in toast.text, 20, what="the toast")
    assert toast.text.startswith("Restored, but the replicas have not confirmed it")
    assert "503" in toast.text and "do not repeat it" in toast.text
    assert "failed" not in toast.text
    after = api.get(f"/models/{model}").json()["version"]
    assert after == before + 1  # the rollback is done and served
    wait_until(lambda: shown_version(browser) == after, 20, what="new version shown")
    ARTEFACTS.mkdir(exist_ok=True)
    browser.save_screenshot(str(ARTEFACTS / "dashboard-unconfirmed-restore.png"))


def test_the_problem_of_an_unconfirmed_write_says_it_was_written(
    served: tuple[str, httpx.Client],
) -> None:
    """The API side alone: the 503 of an unconfirmed snapshot carries ``written: true``;
    other errors do not carry the field."""
    _, api = served
    train(api, MODEL, days=1, snapshot_after=0)
    require_replicas(1, 0.05)
    answer = api.post(f"/models/{MODEL}/snapshots", json={"reason": "unconfirmed"})
    assert answer.status_code == 503, answer.text
    assert answer.json()["written"] is True
    require_replicas(0)
    missing = api.get(f"/models/{MODEL}/snapshots/no-such-snapshot")
    assert missing.status_code == 404
    assert "written" not in missing.json()
