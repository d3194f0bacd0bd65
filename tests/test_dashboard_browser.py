"""The dashboard in headless Chromium against a live app (uvicorn on loopback, private Redis)
with a trained model: one chart series per group, alerts marked and listed with their reasons,
labels (shown, and edited through the page), flagged documents with their reasons in words,
worker health and backlog, a restore that asks first and then shows the new version, and a
phone-width layout without sideways scrolling. Screenshots go to artefacts/."""

from __future__ import annotations

import shutil
import tempfile
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from mixture.routing import NO_KNOWN_WORDS, REVIEW_REASONS
from service.testing import uvicorn_thread, wait_until
from state.connection import redis_from_url
from state.keys import REGISTRY_KEY, ModelKeys
from state.routed_log import RoutedLog, RoutedRecord
from tests.ops_support import ADMIN, ADMIN_KEY, READ_KEY, K, make_app, route_examples, train

pytestmark = [pytest.mark.browser, pytest.mark.redis]

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
CHROMEDRIVER = shutil.which("chromedriver")
ARTEFACTS = Path(__file__).resolve().parent.parent / "artefacts"

if not (CHROMIUM and CHROMEDRIVER):
    pytest.skip(
        "Debian's chromium and chromium-driver are not installed (`make browser` installs them)",
        allow_module_level=True,
    )


@pytest.fixture(scope="module")
def live(redis_url: str) -> Iterator[tuple[str, str, httpx.Client]]:
    model = f"t-dash-{uuid.uuid4().hex[:10]}"
    app = make_app(redis_url, model)
    try:
        with uvicorn_thread(app) as base, httpx.Client(base_url=base, headers=ADMIN) as api:
            train(api, model, days=4, snapshot_after=2)
            route_examples(api, model)
            labelled = api.put(
                f"/models/{model}/groups/0/label",
                json={"label": "Harbour desk", "destination": "harbour@example.invalid"},
            )
            assert labelled.status_code == 200, labelled.text
            # what a mail intake would have recorded: two messages to group 0, one to group 1
            intake_client = redis_from_url(redis_url)
            log = RoutedLog(intake_client, model)
            for i, group in enumerate([0, 0, 1]):
                log.record(RoutedRecord(f"mail-{i}", time.time(), group, None, 0.9, False))
            intake_client.close()
            yield base, model, api
    finally:
        client = redis_from_url(redis_url)
        keys = list(client.scan_iter(match=ModelKeys(model).pattern(), count=1000))
        if keys:
            client.delete(*keys)
        client.srem(REGISTRY_KEY, model)
        client.close()


@pytest.fixture(scope="module")
def browser() -> Iterator[Any]:
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    profile = tempfile.mkdtemp(prefix="mixroute-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = CHROMIUM  # type: ignore[assignment]
    for flag in (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--no-first-run",
        "--disable-dev-shm-usage",
        "--window-size=1400,1900",
        f"--user-data-dir={profile}",
    ):
        options.add_argument(flag)
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(executable_path=CHROMEDRIVER), options=options)
    driver.set_page_load_timeout(30)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def use_key(driver: Any, key: str) -> None:
    from selenium.webdriver.common.by import By

    field = driver.find_element(By.ID, "key-input")
    field.clear()
    field.send_keys(key)
    driver.find_element(By.CSS_SELECTOR, "#key-form button").click()


def shown_version(driver: Any) -> int | None:
    from selenium.webdriver.common.by import By

    value = driver.find_element(By.ID, "version").get_attribute("data-version")
    return int(value) if value else None


def test_dashboard_shows_the_model_and_restores_after_confirmation(
    live: tuple[str, str, httpx.Client], browser: Any
) -> None:
    from selenium.webdriver.common.by import By

    base, model, api = live
    ARTEFACTS.mkdir(exist_ok=True)
    browser.get(f"{base}/dashboard?model={model}")
    # access control is on: nothing is shown until a key is given
    wait_until(lambda: browser.find_element(By.ID, "notice").is_displayed(), 20, what="notice")
    assert "API key" in browser.find_element(By.ID, "notice").text
    use_key(browser, ADMIN_KEY)
    wait_until(lambda: browser.execute_script("return document.body.dataset.loaded"), 20)

    before = api.get(f"/models/{model}").json()
    wait_until(lambda: shown_version(browser) == before["version"], 20, what="version shown")
    assert browser.find_element(By.ID, "role").text == "role admin"

    # the chart: one series per group, in steps at as many times as checkpoints (two points
    # at each time after the first: the weight held, then the new one)
    history = api.get(f"/models/{model}/drift/history", params={"limit": 2000}).json()["rows"]
    series = browser.find_elements(By.CSS_SELECTOR, "#weights-chart polyline.series")
    assert sorted(int(s.get_attribute("data-group")) for s in series) == list(range(K))
    for line in series:
        points = line.get_attribute("points").split()
        assert len(points) == 2 * len(history) - 1
        times = [float(p.split(",")[0]) for p in points]
        assert times == sorted(times)  # never back in time, also across the rollbacks
    alerts = api.get(f"/models/{model}/drift/alerts").json()["alerts"]
    assert alerts, "the invented storm day must raise a drift alert at this threshold"
    marked = browser.find_elements(By.CSS_SELECTOR, "#weights-chart g.alert")
    assert len(marked) == len(alerts)
    assert "Harbour desk" in browser.find_element(By.ID, "legend").text

    # groups with label, size and terms
    cards = browser.find_elements(By.CSS_SELECTOR, "#groups article.group")
    assert len(cards) == K
    groups = api.get(f"/models/{model}/groups", params={"top": 8}).json()["groups"]
    first = cards[0].text
    assert "Harbour desk" in first and "expected documents" in first
    assert groups[0]["top_terms"][0]["term"] in first
    assert groups[0]["distinctive_terms"][0]["term"] in first

    # routed per day: today's row counts what the intake recorded, per group
    daily = api.get(f"/models/{model}/routed/daily", params={"days": 7}).json()["days"]
    today = max(daily)
    assert daily[today] == {"0": 2, "1": 1}
    rows = browser.find_elements(By.CSS_SELECTOR, "#daily tr")
    assert rows and rows[0].text.split() == [today, "2", "1", "3"]
    assert "Harbour desk" in browser.find_element(By.ID, "daily-head").text

    # flagged documents: the junk the helper routed
    flagged_text = browser.find_element(By.ID, "flagged").text
    assert "junk-2" in flagged_text and "no_known_words" in flagged_text
    browser.save_screenshot(str(ARTEFACTS / "dashboard.png"))

    # restore: the dialog asks; "keep" changes nothing
    snapshot = api.get(f"/models/{model}/snapshots").json()["snapshots"][0]
    button = f"button.restore[data-snapshot='{snapshot['id']}']"
    browser.find_element(By.CSS_SELECTOR, button).click()
    dialog = browser.find_element(By.ID, "confirm-dialog")
    wait_until(dialog.is_displayed, 10, what="confirmation dialog")
    assert snapshot["id"] in browser.find_element(By.ID, "confirm-text").text
    browser.save_screenshot(str(ARTEFACTS / "dashboard-confirm.png"))
    browser.find_element(By.ID, "confirm-cancel").click()
    wait_until(lambda: not dialog.is_displayed(), 10, what="dialog closed")
    assert api.get(f"/models/{model}").json()["version"] == before["version"]

    # ... "restore" rolls back, and the page shows the new version
    browser.find_element(By.CSS_SELECTOR, button).click()
    wait_until(dialog.is_displayed, 10, what="confirmation dialog")
    browser.find_element(By.ID, "confirm-restore").click()
    after = wait_until(
        lambda: (
            (body := api.get(f"/models/{model}").json())["version"] > before["version"] and body
        ),
        20,
        what="the rollback",
    )
    assert after["documents_learned"] == snapshot["documents_learned"]
    wait_until(lambda: shown_version(browser) == after["version"], 20, what="new version shown")
    assert "Restored snapshot" in browser.find_element(By.ID, "toast").text
    browser.save_screenshot(str(ARTEFACTS / "dashboard-restored.png"))

    # a read key sees everything but cannot restore
    use_key(browser, READ_KEY)
    wait_until(lambda: browser.find_element(By.ID, "role").text == "role read", 20)
    # the role is shown first, the snapshot table is redrawn by the same refresh just after
    wait_until(
        lambda: not browser.find_elements(By.CSS_SELECTOR, "button.restore"),
        20,
        what="restore buttons gone for the read role",
    )
    assert browser.find_elements(By.CSS_SELECTOR, "#snapshots tr[data-snapshot]")

    # no script error and nothing the page's security policy had to block; the only errors
    # allowed are the 401s of the first load, before a key was typed in
    entries = browser.get_log("browser")
    errors = [
        entry["message"]
        for entry in entries
        if entry["level"] == "SEVERE" and "401" not in entry["message"]
    ]
    assert not errors, errors


# (after the test above: it starts from a tab that has no key yet)


def open_as_admin(driver: Any, base: str, model: str) -> None:
    """Load the page for ``model`` with the admin key and wait for a full load."""
    from selenium.webdriver.common.by import By

    driver.get(f"{base}/dashboard?model={model}")
    wait_until(lambda: driver.find_element(By.ID, "key-input").is_displayed(), 20, what="key")
    use_key(driver, ADMIN_KEY)
    wait_until(lambda: driver.find_element(By.ID, "role").text == "role admin", 20, what="admin")
    wait_until(lambda: driver.find_elements(By.CSS_SELECTOR, "button.edit-label"), 20)
    wait_until(lambda: driver.execute_script("return document.body.dataset.loaded"), 20)


def phone_width(driver: Any, width: int | None) -> None:
    """Emulate a phone's viewport ``width`` CSS pixels wide (None: back to the window)."""
    if width is None:
        driver.execute_cdp_cmd("Emulation.clearDeviceMetricsOverride", {})
        return
    driver.execute_cdp_cmd(
        "Emulation.setDeviceMetricsOverride",
        {"width": width, "height": 844, "deviceScaleFactor": 1, "mobile": True},
    )


def test_dashboard_lists_alerts_with_reasons_and_flagged_reasons_in_words(
    live: tuple[str, str, httpx.Client], browser: Any
) -> None:
    from selenium.webdriver.common.by import By

    base, model, api = live
    ARTEFACTS.mkdir(exist_ok=True)
    open_as_admin(browser, base, model)
    # the alert list: one row per alert the API has, newest first, each with its reason
    alerts = api.get(f"/models/{model}/drift/alerts", params={"count": 500}).json()["alerts"]
    assert alerts, "the invented storm day must raise a drift alert at this threshold"
    rows = browser.find_elements(By.CSS_SELECTOR, "#alerts tr[data-alert]")
    assert [r.get_attribute("data-alert") for r in rows] == [a["id"] for a in reversed(alerts)]
    for row, alert in zip(rows, reversed(alerts), strict=True):
        assert alert["reason"] in row.find_element(By.CSS_SELECTOR, "td.alert-reason").text
        assert alert["kind"] in row.text

    # the flagged table says why in words, from the one reason table the API serves
    served = httpx.get(f"{base}/review-reasons", headers=ADMIN).json()["reasons"]
    assert {r["name"]: r["words"] for r in served} == REVIEW_REASONS
    junk = browser.find_element(By.XPATH, "//tbody[@id='flagged']/tr[td[text()='junk-2']]")
    reason = junk.find_element(By.CSS_SELECTOR, f"li[data-reason='{NO_KNOWN_WORDS}']")
    assert REVIEW_REASONS[NO_KNOWN_WORDS] in reason.text

    # a readable page: the flagged table no longer stretches it (issue 14 saw 3,700 px)
    height = browser.execute_script("return document.getElementById('flagged').offsetHeight")
    assert height < 1200, height  # 15 rows of short text; a rule of thumb, no source

    # worker health and backlog, as the API reports them; last updated
    ready = httpx.get(f"{base}/ready").json()
    entry = next(m for m in ready["models"] if m["name"] == model)
    assert entry["worker_heartbeat_age_seconds"] is not None
    assert browser.find_element(By.ID, "heartbeat").text.endswith("ago")
    lag = api.get(f"/models/{model}").json()["stream"]["lag"]
    assert browser.find_element(By.ID, "backlog").text.startswith(f"{lag} message")
    assert browser.find_element(By.ID, "updated").get_attribute("data-time")
    assert browser.find_element(By.ID, "degraded").is_displayed() is False
    browser.save_screenshot(str(ARTEFACTS / "dashboard-alerts.png"))


def test_dashboard_edits_a_label_through_the_page(
    live: tuple[str, str, httpx.Client], browser: Any
) -> None:
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys

    base, model, api = live
    open_as_admin(browser, base, model)
    browser.find_element(By.CSS_SELECTOR, "button.edit-label[data-group='1']").click()
    # the fields have labels and take the keyboard focus
    field = browser.find_element(By.ID, "label-1-label")
    assert browser.switch_to.active_element == field
    assert browser.find_element(By.CSS_SELECTOR, "label[for='label-1-label']").text == "label"
    field.clear()
    field.send_keys("Timetable questions")
    destination = browser.find_element(By.ID, "label-1-destination")
    destination.clear()
    destination.send_keys("timetable@example.invalid", Keys.ENTER)

    def labelled() -> dict[str, Any] | None:
        group = api.get(f"/models/{model}/groups/1").json()
        return group if group.get("label") == "Timetable questions" else None

    group = wait_until(labelled, 20, what="the label through the API")
    assert group["destination"] == "timetable@example.invalid"
    card = "#groups article.group[data-group='1']"

    def card_text() -> str | None:
        text = str(browser.find_element(By.CSS_SELECTOR, card).text)
        return text if "Timetable questions" in text else None

    # steady: the card may be redrawn while it is read
    shown = wait_until(steady(card_text), 20, what="the new label on its card")
    assert "timetable@example.invalid" in shown
    # the keyboard focus is back on the card's Edit button, not lost to the page
    focused = browser.switch_to.active_element
    assert focused.get_attribute("class") == "edit-label"
    assert focused.get_attribute("data-group") == "1"

    # a read key sees no edit button
    use_key(browser, READ_KEY)
    wait_until(lambda: browser.find_element(By.ID, "role").text == "role read", 20)
    wait_until(lambda: not browser.find_elements(By.CSS_SELECTOR, "button.edit-label"), 20)


def test_dashboard_fits_a_phone_width(live: tuple[str, str, httpx.Client], browser: Any) -> None:
    from selenium.webdriver.common.by import By

    base, model, _ = live
    ARTEFACTS.mkdir(exist_ok=True)
    phone_width(browser, 390)
    try:
        open_as_admin(browser, base, model)
        width = browser.execute_script("return document.documentElement.clientWidth")
        assert width == 390
        scroll = browser.execute_script("return document.documentElement.scrollWidth")
        assert scroll <= 390, scroll
        # the stacked tables still name each value's column
        first = browser.find_element(By.CSS_SELECTOR, "#flagged tr td[data-label='when']")
        assert first.is_displayed()
        browser.save_screenshot(str(ARTEFACTS / "dashboard-phone.png"))
    finally:
        phone_width(browser, None)


def test_dashboard_files_are_served_from_the_app_only(live: tuple[str, str, httpx.Client]) -> None:
    """No CDN: every script, style and image the page names is on this origin and served."""
    import re

    base, _, _ = live
    answer = httpx.get(f"{base}/dashboard")
    policy = answer.headers["Content-Security-Policy"]
    assert "default-src 'none'" in policy and "script-src 'self';" in policy
    page = answer.text
    references = re.findall(r'(?:src|href)="([^"]+)"', page)
    assert references
    for ref in references:
        assert ref.startswith("/dashboard/static/"), ref
        assert httpx.get(f"{base}{ref}").status_code == 200
    script = httpx.get(f"{base}/dashboard/static/dashboard.js").text
    assert "http://" not in script.replace("http://www.w3.org/2000/svg", "")
    assert "https://" not in script


def rgb(hex_colour: str) -> str:
    """A ``#rrggbb`` colour as the browser's computed style writes it."""
    r, g, b = (int(hex_colour[i : i + 2], 16) for i in (1, 3, 5))
    return f"rgb({r}, {g}, {b})"


# Everything the rollback test reads from the chart, in one script run: the page redraws the
# chart every few seconds, so elements found one call earlier can be gone (stale) the next.
CHART_READING = """
const chart = document.getElementById("weights-chart");
const css = (node, property) => getComputedStyle(node)[property];
const viewBox = chart.viewBox.baseVal;
return {
  name: document.getElementById("chart").getAttribute("aria-label"),
  rollbacks: [...chart.querySelectorAll("g.rollback-mark")].map((mark) => {
    const label = mark.querySelector("text.rollback-label");
    const box = label.getBBox();
    return {
      version: Number(mark.dataset.version), snapshot: mark.dataset.snapshot,
      aria: mark.getAttribute("aria-label"), title: mark.querySelector("title").textContent,
      label: label.textContent, left: box.x, right: box.x + box.width, width: viewBox.width,
      stroke: css(mark.querySelector("line.rollback-line"), "stroke"),
    };
  }),
  series: [...chart.querySelectorAll("polyline.series")].map(
    (line) => [Number(line.dataset.group), css(line, "stroke")]),
  alerts: [...chart.querySelectorAll("rect.alert-mark")].map((mark) => css(mark, "fill")),
  snapshots: [...chart.querySelectorAll("g.snapshot-mark")].map(
    (mark) => [mark.dataset.kind, css(mark.querySelector("line"), "stroke")]),
};
"""


def test_dashboard_marks_rollbacks_in_the_palette_colours(
    live: tuple[str, str, httpx.Client], browser: Any
) -> None:
    """After a rollback (with replay) the chart shows a labelled marker whose hover and
    accessible text name the snapshot and the replay, at desktop and phone widths; the lines
    and markers are drawn in the colours of palette.json, the file the PNG plot reads."""
    from service.plot import palette

    base, model, api = live
    ARTEFACTS.mkdir(exist_ok=True)
    snapshot = api.post(f"/models/{model}/snapshots", json={"reason": "before the marker test"})
    assert snapshot.status_code == 201, snapshot.text
    snap_id = snapshot.json()["id"]
    restored = api.post(f"/models/{model}/snapshots/{snap_id}/restore", json={"replay": True})
    assert restored.status_code == 200, restored.text
    version = restored.json()["version"]
    history = api.get(f"/models/{model}/drift/history", params={"limit": 2000}).json()["rows"]
    rollbacks = [row for row in history if row["kind"] == "rollback"]
    assert rollbacks[-1]["version"] == version and rollbacks[-1]["replay"] is True
    colours = palette()
    words = f"version {version}: rolled back to snapshot {snap_id}, replay on"
    for width in (None, 390):
        phone_width(browser, width)
        try:
            open_as_admin(browser, base, model)
            wait_until(lambda: (shown_version(browser) or 0) >= version, 20, what="rollback shown")
            chart = wait_until(
                lambda: (
                    (got := browser.execute_script(CHART_READING))["rollbacks"]
                    and got["rollbacks"][-1]["version"] >= version
                    and got
                ),
                20,
                what="the rollback's marker",
            )
            assert [m["version"] for m in chart["rollbacks"]] == [r["version"] for r in rollbacks]
            mark = chart["rollbacks"][-1]
            assert mark["snapshot"] == snap_id
            assert mark["aria"] == words and mark["title"] == words
            assert mark["label"] == f"rollback to {snap_id}"
            assert words.replace(":", "") in chart["name"]
            # the label stays inside the drawing (nothing cut off at the phone's width)
            assert mark["left"] >= 0 and mark["right"] <= mark["width"], mark

            # one palette: computed colours (after the style sheet) are palette.json's
            assert mark["stroke"] == rgb(colours["marks"]["rollback"])
            assert chart["series"]
            for group, stroke in chart["series"]:
                assert stroke == rgb(colours["groups"][group % len(colours["groups"])])
            assert chart["alerts"]
            for fill in chart["alerts"]:
                assert fill == rgb(colours["marks"]["alert"])
            assert chart["snapshots"]
            for kind, stroke in chart["snapshots"]:
                key = "pre-rollback" if kind == "pre-rollback" else "snapshot"
                assert stroke == rgb(colours["marks"][key])
            name = "dashboard-rollback.png" if width is None else "dashboard-rollback-phone.png"
            browser.save_screenshot(str(ARTEFACTS / name))
        finally:
            phone_width(browser, None)


def steady(probe: Any) -> Any:
    """``probe`` for wait_until, reading None while the page is redrawing the element it
    looked at (the 5 s refresh replaces rows and cards whose content changed)."""
    from selenium.common.exceptions import NoSuchElementException, StaleElementReferenceException

    def read() -> Any:
        try:
            return probe()
        except (StaleElementReferenceException, NoSuchElementException):
            return None

    return read


def flagged_row(driver: Any, doc_id: str) -> Any:
    from selenium.webdriver.common.by import By

    return driver.find_element(By.CSS_SELECTOR, f"#flagged tr[data-document='{doc_id}']")


def corrections_shown(driver: Any) -> str:
    from selenium.webdriver.common.by import By

    return str(driver.find_element(By.ID, "corrections-count").text)


def test_dashboard_reassigns_and_confirms_flagged_messages_by_keyboard_and_counts_them(
    live: tuple[str, str, httpx.Client], browser: Any
) -> None:
    """Issue 12's browser test: a flagged message reassigned to another group from its row
    (keyboard only: the picker, then Reassign), one confirmed at phone width, each sent as a
    correction (POST .../corrections with the message's id) and counted from
    GET .../corrections; the page never scrolls sideways."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys

    base, model, api = live
    ARTEFACTS.mkdir(exist_ok=True)
    open_as_admin(browser, base, model)
    flagged = api.get(f"/models/{model}/flagged", params={"count": 15}).json()["documents"]
    target = next(d for d in flagged if d["id"] == "junk-2")
    row = flagged_row(browser, "junk-2")
    picker = row.find_element(By.CSS_SELECTOR, "select.group-picker")
    # labelled controls: the picker has a <label for> and an accessible name, buttons say what
    assert browser.find_element(By.CSS_SELECTOR, f"label[for='{picker.get_attribute('id')}']")
    assert "junk-2" in picker.get_attribute("aria-label")
    reassign = row.find_element(By.CSS_SELECTOR, "button.reassign")
    assert reassign.get_attribute("disabled")  # nothing picked yet: the routed group
    assert "junk-2" in row.find_element(By.CSS_SELECTOR, "button.confirm").get_attribute(
        "aria-label"
    )
    # keyboard only: focus the picker, move to the next group, Tab past Confirm to Reassign
    browser.execute_script("arguments[0].focus()", picker)
    picker.send_keys(Keys.DOWN)
    chosen = int(
        flagged_row(browser, "junk-2")
        .find_element(By.CSS_SELECTOR, "select.group-picker")
        .get_attribute("value")
    )
    assert chosen != target["group"]
    active = browser.switch_to.active_element
    active.send_keys(Keys.TAB)
    active = browser.switch_to.active_element
    assert "confirm" in active.get_attribute("class")
    active.send_keys(Keys.TAB)
    active = browser.switch_to.active_element
    assert "reassign" in active.get_attribute("class") and active.is_enabled()
    active.send_keys(Keys.ENTER)
    wait_until(
        steady(lambda: "Reassigned to" in flagged_row(browser, "junk-2").text),
        20,
        what="the row's result",
    )

    # the API holds it as a correction of the chosen group, and the page counts it
    def held() -> dict[str, Any] | None:
        answer = api.get(f"/models/{model}/corrections").json()
        docs = {d["id"]: d for d in answer["documents"]}
        return answer if docs.get("junk-2", {}).get("group") == chosen else None

    listed = wait_until(held, 30, what="the correction learned")
    learned_count = listed["sources"].get("correction", 0)
    wait_until(
        lambda: corrections_shown(browser).startswith(f"corrections: {learned_count} learned"),
        20,
        what="the count on the page",
    )
    browser.save_screenshot(str(ARTEFACTS / "dashboard-corrected.png"))

    # at phone width: no sideways scroll, and Confirm works from the keyboard
    phone_width(browser, 390)
    try:
        open_as_admin(browser, base, model)
        assert browser.execute_script("return document.documentElement.scrollWidth") <= 390
        other = next(d for d in flagged if d["id"] not in ("junk-2",))
        confirm = flagged_row(browser, other["id"]).find_element(By.CSS_SELECTOR, "button.confirm")
        assert confirm.is_displayed()
        browser.execute_script("arguments[0].focus()", confirm)
        browser.switch_to.active_element.send_keys(Keys.ENTER)
        wait_until(
            steady(lambda: "Confirmed to" in flagged_row(browser, other["id"]).text),
            20,
            what="the confirmation's result",
        )

        def confirmed() -> dict[str, Any] | None:
            answer = api.get(f"/models/{model}/corrections").json()
            docs = {d["id"]: d for d in answer["documents"]}
            return answer if docs.get(other["id"], {}).get("group") == other["group"] else None

        listed = wait_until(confirmed, 30, what="the confirmation learned")
        count = listed["sources"].get("correction", 0)
        assert count == learned_count + 1
        wait_until(
            lambda: corrections_shown(browser).startswith(f"corrections: {count} learned"),
            20,
            what="the count on the page",
        )
        assert browser.execute_script("return document.documentElement.scrollWidth") <= 390
        # a reload still says which rows were corrected (from GET .../corrections?ids=...),
        # and a row nobody corrected says nothing
        open_as_admin(browser, base, model)
        wait_until(
            steady(
                lambda: (
                    "Reassigned to" in flagged_row(browser, "junk-2").text
                    and "Confirmed to" in flagged_row(browser, other["id"]).text
                )
            ),
            20,
            what="the corrections' status after a reload",
        )
        untouched = [d["id"] for d in flagged if d["id"] not in ("junk-2", other["id"])]
        if untouched:
            status = flagged_row(browser, untouched[0]).find_element(
                By.CSS_SELECTOR, ".correct-status"
            )
            assert status.text == ""
        # the screenshot shows the flagged panel's head (the count) and its first rows
        browser.execute_script(
            "document.getElementById('flagged-panel').scrollIntoView();"
            "document.getElementById('toast').hidden = true;"
        )
        browser.save_screenshot(str(ARTEFACTS / "dashboard-phone-corrected.png"))
    finally:
        phone_width(browser, None)


def test_dashboard_marks_stale_labels_and_keeps_one_by_keyboard(
    live: tuple[str, str, httpx.Client], browser: Any
) -> None:
    """The invented junk burst takes over a labelled group: its card is marked stale (as
    GET .../groups says), and "Label still fits" (PATCH refresh) clears it. Runs last: it
    feeds the junk day into the module's model."""
    from selenium.webdriver.common.by import By
    from selenium.webdriver.common.keys import Keys

    from service.demo_data import default_days, generate_day
    from service.testing import learned
    from tests.ops_support import SCALE

    base, model, api = live
    ARTEFACTS.mkdir(exist_ok=True)
    for group in api.get(f"/models/{model}/groups").json()["groups"]:
        if not group["label"]:
            answer = api.patch(
                f"/models/{model}/groups/{group['group']}/label",
                json={"label": f"topic {group['group']}"},
            )
            assert answer.status_code == 200, answer.text
    before = api.get(f"/models/{model}").json()["documents_learned"]
    junk_day = generate_day(default_days(SCALE)[4], seed=11)
    fed = api.post(
        f"/models/{model}/documents",
        json={"documents": [{"id": m.id, "text": m.text} for m in junk_day]},
    )
    assert fed.status_code == 202, fed.text
    wait_until(lambda: learned(api, model, before + len(junk_day)), 90, what="the junk day")

    def stale_groups() -> set[int] | None:
        groups = api.get(f"/models/{model}/groups").json()["groups"]
        found = {g["group"] for g in groups if g["label_stale"]}
        return found or None

    stale = wait_until(stale_groups, 30, what="a stale label")
    open_as_admin(browser, base, model)

    def marked() -> set[int]:
        cards = browser.find_elements(By.CSS_SELECTOR, "#groups article.group[data-label-stale]")
        return {int(c.get_attribute("data-group")) for c in cards}

    wait_until(steady(lambda: marked() == stale), 20, what="the stale cards")
    group = min(stale)
    browser.save_screenshot(str(ARTEFACTS / "dashboard-stale.png"))

    def keep_by_keyboard() -> bool:
        card = browser.find_element(By.CSS_SELECTOR, f"#groups article.group[data-group='{group}']")
        assert "Label may no longer fit" in card.text
        keep = card.find_element(By.CSS_SELECTOR, "button.refresh-label")
        assert str(group) in keep.get_attribute("aria-label")
        browser.execute_script("arguments[0].focus()", keep)
        browser.switch_to.active_element.send_keys(Keys.ENTER)
        return True

    wait_until(steady(keep_by_keyboard), 20, what="'Label still fits' pressed")
    wait_until(steady(lambda: group not in marked()), 20, what="the card no longer stale")
    assert api.get(f"/models/{model}/groups/{group}").json()["label_stale"] is False
