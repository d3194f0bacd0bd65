"""The PNG weights plot (service/plot.py), checked through matplotlib's own objects (the
lines' data, colours and labels, the legend's texts, the markers' artists), never by pixels;
and the one palette the dashboard script and the plot share.

The history below is written by hand in the shape the API answers (GET .../drift/history):
a group born, then a rollback to before its birth. The same checks on the rows a live API
wrote after real rollbacks are in tests/test_cli_service.py.
"""

from __future__ import annotations

import itertools
import json
import math
import re
from datetime import UTC, datetime
from typing import Any

import pytest

from service.plot import (
    PALETTE_PATH,
    PlotError,
    PlotInputs,
    fetch_plot_inputs,
    group_colour,
    palette,
    weights_figure,
)

pytest.importorskip("matplotlib")

from matplotlib.colors import to_hex

T0 = 1_780_000_000.0  # an arbitrary instant (2026-05-28), one checkpoint a minute after it


def history() -> list[dict[str, Any]]:
    """Six checkpoints of groups 0-2, a birth of group 5, a rollback to snapshot snap-000002
    (taken after the third checkpoint: its weights and documents come back, group 5 is gone),
    one checkpoint after."""
    rows = [
        {
            "time": T0 + 60 * i,
            "version": i + 1,
            "documents_learned": 100 * (i + 1),
            "weights": [0.5, 0.3, 0.2],
            "group_ids": [0, 1, 2],
            "kind": "checkpoint",
        }
        for i in range(6)
    ]
    rows.append(
        {
            "time": T0 + 360,
            "version": 7,
            "documents_learned": 700,
            "weights": [0.4, 0.3, 0.2, 0.1],
            "group_ids": [0, 1, 2, 5],
        }
    )
    rows.append(
        {
            "time": T0 + 420,
            "version": 8,
            "documents_learned": 800,
            "weights": [0.4, 0.3, 0.15, 0.15],
            "group_ids": [0, 1, 2, 5],
        }
    )
    rows.append(
        {
            "time": T0 + 480,
            "version": 9,
            "documents_learned": 300,
            "weights": [0.5, 0.3, 0.2],
            "group_ids": [0, 1, 2],
            "kind": "rollback",
            "snapshot_id": "snap-000002",
            "replay": False,
        }
    )
    rows.append(
        {
            "time": T0 + 540,
            "version": 10,
            "documents_learned": 400,
            "weights": [0.45, 0.35, 0.2],
            "group_ids": [0, 1, 2],
        }
    )
    return rows


def inputs() -> PlotInputs:
    return PlotInputs(
        rows=history(),
        labels={0: "harbour desk", 5: "lost property"},
        alerts=[
            {"time": T0 + 180, "kind": "weight_drift", "version": 4, "reason": "weights moved"},
            # group events have their own markers: their alerts get no diamond (as on the page)
            {"time": T0 + 360, "kind": "group-birth", "version": 7, "reason": "born"},
            {"time": T0 + 99_999, "kind": "weight_drift", "version": 99, "reason": "far after"},
        ],
        snapshots=[
            {"id": "snap-000002", "created": T0 + 150, "kind": "requested"},
            {"id": "snap-000003", "created": T0 + 480, "kind": "pre-rollback"},
        ],
        events=[{"time": T0 + 360, "kind": "birth", "groups": [5], "version": 7}],
    )


def by_gid(ax: Any) -> dict[str, Any]:
    return {line.get_gid(): line for line in ax.get_lines() if line.get_gid()}


def test_time_axis_is_monotone_across_a_rollback() -> None:
    rows = history()
    ax = weights_figure(inputs(), "t", tz=UTC).axes[0]
    # the old axis (documents learned) goes back at the rollback: the reason for time
    learned = [row["documents_learned"] for row in rows]
    assert learned[8] < learned[7]
    for group in (0, 1, 2, 5):
        xs = list(by_gid(ax)[f"group:{group}"].get_xdata())
        assert all(isinstance(x, datetime) for x in xs)
        assert xs == [datetime.fromtimestamp(row["time"], UTC) for row in rows]
        assert all(a < b for a, b in itertools.pairwise(xs))
    assert by_gid(ax)["group:0"].get_drawstyle() == "steps-post"


def test_groups_are_lines_by_id_with_gaps_where_they_did_not_exist() -> None:
    ax = weights_figure(inputs(), "t", tz=UTC).axes[0]
    born = list(by_gid(ax)["group:5"].get_ydata())
    # group 5 exists at versions 7 and 8 only: born by the birth, gone with the rollback
    assert [not math.isnan(w) for w in born] == [False] * 6 + [True, True] + [False, False]
    assert born[6:8] == [0.1, 0.15]
    # group 2 keeps its own weights whatever position it has in each row
    assert list(by_gid(ax)["group:2"].get_ydata()) == [0.2] * 7 + [0.15, 0.2, 0.2]


def test_legend_says_the_labels_and_the_markers() -> None:
    ax = weights_figure(inputs(), "t", tz=UTC).axes[0]
    texts = [text.get_text() for text in ax.get_legend().get_texts()]
    assert texts[:4] == ["0 · harbour desk", "group 1", "group 2", "5 · lost property"]
    assert set(texts[4:]) == {
        "drift alert",
        "group born",
        "snapshot",
        "pre-rollback snapshot",
        "rollback",
    }


def test_markers_sit_at_their_times() -> None:
    ax = weights_figure(inputs(), "t", tz=UTC).axes[0]
    lines = by_gid(ax)

    def at(seconds: float) -> datetime:
        return datetime.fromtimestamp(seconds, UTC)

    # one diamond: the group-birth alert is the event's circle, the late alert is off the plot
    assert list(lines["alerts"].get_xdata()) == [at(T0 + 180)]
    assert list(lines["events:birth"].get_xdata()) == [at(T0 + 360)]
    assert list(lines["snapshots:snapshot"].get_xdata()) == [at(T0 + 150)]
    assert list(lines["snapshots:pre-rollback"].get_xdata()) == [at(T0 + 480)]
    rollback = lines["rollback:9"]
    assert list(rollback.get_xdata()) == [at(T0 + 480)] * 2  # a vertical line at its time
    texts = {t.get_gid(): t.get_text() for t in ax.texts}
    assert texts["rollback-text:9"] == "rolled back to snapshot snap-000002\nreplay off"


def test_colours_are_the_palette_the_dashboard_reads() -> None:
    shared = json.loads(PALETTE_PATH.read_text())
    ax = weights_figure(inputs(), "t", tz=UTC).axes[0]
    lines = by_gid(ax)
    for group in (0, 1, 2, 5):
        expected = shared["groups"][group % len(shared["groups"])]
        assert to_hex(lines[f"group:{group}"].get_color()) == expected == group_colour(group)
    assert to_hex(lines["alerts"].get_color()) == shared["marks"]["alert"]
    assert to_hex(lines["events:birth"].get_color()) == shared["marks"]["birth"]
    assert to_hex(lines["rollback:9"].get_color()) == shared["marks"]["rollback"]
    assert to_hex(lines["snapshots:pre-rollback"].get_color()) == shared["marks"]["pre-rollback"]


def test_dashboard_script_and_style_keep_no_colours_of_their_own() -> None:
    """The page's chart colours come from the file only (the browser test checks the drawn
    colours): the script fetches palette.json and names no colour but its grey placeholder,
    and the style sheet colours no series or marker (the rules of earlier versions did)."""
    static = PALETTE_PATH.parent
    script = (static / "dashboard.js").read_text()
    assert "/dashboard/static/palette.json" in script
    assert re.findall(r"#[0-9a-fA-F]{6}\b", script) == ["#5d6b6f"]
    style = (static / "dashboard.css").read_text()
    for selector in (
        ".series",
        ".alert-mark",
        ".alert-line",
        ".event-mark",
        ".snap-tick",
        ".rollback-line",
        ".rollback-flag",
    ):
        for rule in re.findall(re.escape(selector) + r"[^{]*\{([^}]*)\}", style):
            # "none", and white outlines (the plot's markers have them too), only
            for value in re.findall(r"(?<![-\w])(?:fill|stroke)\s*:\s*([^;]+)", rule):
                assert value.strip() in ("none", "white"), (selector, rule)
    assert set(palette()["marks"]) >= {"alert", "birth", "merge", "retire", "rollback"}


def test_rows_without_ids_or_kind_read_as_checkpoints_of_groups_0_to_k() -> None:
    old = [
        {"time": T0 + i, "version": i + 1, "documents_learned": i, "weights": [0.6, 0.4]}
        for i in range(3)
    ]
    ax = weights_figure(PlotInputs(old), "t", tz=UTC).axes[0]
    assert {"group:0", "group:1"} == {g for g in by_gid(ax) if g.startswith("group:")}
    assert not any(g.startswith("rollback") for g in by_gid(ax))


def test_no_history_is_a_plot_error() -> None:
    with pytest.raises(PlotError, match="no drift history"):
        weights_figure(PlotInputs([]), "t")


def test_fetch_reads_labels_alerts_snapshots_and_events() -> None:
    asked: list[str] = []
    answers = {
        "/models/m/drift/history": {"rows": history()},
        "/models/m/groups": {
            "groups": [
                {"group": 0, "label": "harbour desk", "merged_labels": []},
                # group 1 absorbed group 4 (labelled) and group 6 (not)
                {
                    "group": 1,
                    "label": None,
                    "merged_labels": [
                        {"group": 4, "label": "ferry times", "destination": None},
                        {"group": 6, "label": None, "destination": None},
                    ],
                },
            ]
        },
        "/models/m/drift/alerts": {"alerts": []},
        "/models/m/snapshots": {"snapshots": []},
        "/models/m/events": {"events": []},
    }

    def get(path: str, params: dict[str, Any] | None = None) -> Any:
        asked.append(path)
        return answers[path]

    fetched = fetch_plot_inputs(get, "m")
    assert fetched.labels == {0: "harbour desk", 4: "ferry times"}
    assert len(fetched.rows) == len(history())
    assert sorted(asked) == sorted(answers)
    asked.clear()
    fetch_plot_inputs(get, "m", rows=history()[:2])
    assert "/models/m/drift/history" not in asked  # the drift command's rows are reused
