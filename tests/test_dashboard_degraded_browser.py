"""The dashboard with Redis stopped mid-test (a private Redis of this module alone), in
headless Chromium: the page says which parts stopped answering and keeps showing what still
answers from the API's memory (groups, flagged documents, the model's version), instead of
one "Cannot load: 503" and nothing. Screenshot to artefacts/."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import httpx
import pytest

from service.testing import free_port, uvicorn_thread, wait_until
from state.connection import EmbeddedRedis
from tests.ops_support import ADMIN, K, make_app, route_examples, train
from tests.test_dashboard_browser import ARTEFACTS, browser, open_as_admin  # noqa: F401

pytestmark = [pytest.mark.browser, pytest.mark.redis]


def test_dashboard_shows_what_still_answers_when_redis_is_down(
    tmp_path: Path,
    browser: Any,  # noqa: F811 - the browser fixture of the dashboard tests
) -> None:
    from selenium.webdriver.common.by import By

    model = "degraded-dashboard"
    server = EmbeddedRedis(tmp_path / "redis", port=free_port(), appendfsync="no").start()
    try:
        app = make_app(server.url, model, redis_timeout=0.5)
        with uvicorn_thread(app) as base, httpx.Client(base_url=base, headers=ADMIN) as api:
            train(api, model, days=2, snapshot_after=1)
            route_examples(api, model)
            open_as_admin(browser, base, model)
            assert browser.find_element(By.ID, "degraded").is_displayed() is False
            version = api.get(f"/models/{model}").json()["version"]

            server.stop()
            app.state.runtime.poll_once()  # the poller notices (no timing in the test)
            assert app.state.runtime.redis_ok is False
            # what the API itself still answers (the page must show exactly these)
            assert api.get(f"/models/{model}/groups").status_code == 200
            assert api.get(f"/models/{model}/flagged").status_code == 200
            assert api.get(f"/models/{model}/drift/alerts").status_code == 503

            wait_until(
                lambda: browser.execute_script("return document.body.dataset.degraded") == "true",
                30,
                what="the page in degraded mode",
            )
            banner = browser.find_element(By.ID, "degraded")
            assert banner.is_displayed()
            down, _, up = banner.text.partition("Still answering")
            for part in ("weights over time", "alerts", "snapshots", "routed per day", "backlog"):
                assert part in down, (part, banner.text)
            assert "503" in down
            for part in ("groups", "flagged", "worker health"):
                assert part in up, (part, banner.text)
            assert "Cannot load" not in browser.find_element(By.ID, "notice").text
            # what answers is still on the page: every group card, the flagged documents
            cards = browser.find_elements(By.CSS_SELECTOR, "#groups article.group")
            assert len(cards) == K
            assert "junk-2" in browser.find_element(By.ID, "flagged").text
            assert browser.find_element(By.ID, "version").get_attribute("data-version") == str(
                version
            )
            assert browser.find_element(By.ID, "redis-state").text == "unreachable"
            assert "unavailable" in browser.find_element(By.ID, "alerts-panel").get_attribute(
                "class"
            )
            assert "unavailable" not in browser.find_element(By.ID, "groups-panel").get_attribute(
                "class"
            )
            assert "(partly)" in browser.find_element(By.ID, "updated").text
            ARTEFACTS.mkdir(exist_ok=True)
            browser.save_screenshot(str(ARTEFACTS / "dashboard-degraded.png"))
    finally:
        server.stop()
