"""The PNG plot of a model's mixture weights (``mixroute drift --plot``, ``mixroute demo --plot``).

The x axis is each history row's ``time``: the wall-clock time its version was written, which
only grows, so a rollback draws a jump (marked, with the snapshot it restored and whether the
stream is replayed) and never a line back over itself. The lines are steps (a version's weights
hold until the next version), as on the dashboard. One line per group id, over the rows
where that group existed (a gap where it did not), named as the dashboard names it: the
group's label by id, "group N" without one. Drift alerts (diamonds at the top), births, merges
and retirements (circles under them), snapshots (ticks on the axis) and rollbacks (a solid line
with its text) are drawn in the dashboard's colours, read from the one palette both use
(``service/static/palette.json``).

matplotlib is imported only when a figure is drawn (it is the ``plot`` extra).
"""

from __future__ import annotations

import json
import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import datetime, tzinfo
from functools import cache
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from matplotlib.figure import Figure

PALETTE_PATH = Path(__file__).resolve().parent / "static" / "palette.json"

# what a group event's kind is called in the legend (the kinds of mixture.lifecycle)
EVENT_WORDS = {"birth": "group born", "merge": "groups merged", "retire": "group retired"}

# a marker outside the history's time range by more than this share of it is left out (the
# dashboard's rule too): an alert a minute after the last row is still shown, at the edge
EDGE_SHARE = 0.02

Getter = Callable[..., Any]  # get(path, params={...}) -> the decoded JSON body


class PlotError(Exception):
    """Nothing to plot, or no matplotlib to plot with (the message says what to do)."""


@cache
def palette() -> dict[str, Any]:
    """The chart colours shared with the dashboard: ``groups`` (a list) and ``marks`` (by
    marker kind), from ``service/static/palette.json``."""
    with PALETTE_PATH.open(encoding="utf-8") as handle:
        data = json.load(handle)
    return {"groups": list(data["groups"]), "marks": dict(data["marks"])}


def group_colour(group: int) -> str:
    """The colour of group id ``group`` (the dashboard's ``colour(group)``)."""
    colours = palette()["groups"]
    return str(colours[group % len(colours)])


def group_name(group: int, labels: dict[int, str]) -> str:
    """``"3 · harbour desk"`` for a labelled group, ``"group 3"`` otherwise (as the dashboard)."""
    label = labels.get(group)
    return f"{group} · {label}" if label else f"group {group}"


@dataclass(frozen=True)
class PlotInputs:
    """What the plot draws, as the API answers it (JSON dicts).

    ``rows`` are drift-history rows, oldest first; ``labels`` maps group id to label;
    ``alerts``, ``snapshots`` and ``events`` are the API's lists (any order).
    """

    rows: list[dict[str, Any]]
    labels: dict[int, str] = field(default_factory=dict)
    alerts: list[dict[str, Any]] = field(default_factory=list)
    snapshots: list[dict[str, Any]] = field(default_factory=list)
    events: list[dict[str, Any]] = field(default_factory=list)


def fetch_plot_inputs(
    get: Getter,
    model: str,
    rows: Sequence[dict[str, Any]] | None = None,
    history_limit: int = 2000,
) -> PlotInputs:
    """Read what the plot needs from the API: history (unless ``rows`` are given), labels,
    alerts, snapshots and group events.

    Labels are the current groups' and those of groups merged into them (``merged_labels``); a
    retired group's line is "group N" (the API lists current groups only).

    Parameters
    ----------
    get : callable
        ``get(path, params={...})`` returning the JSON body (the command line's ``ApiClient.get``).
    model : str
        The model's name.
    rows : sequence of dict, optional
        History rows already read (the drift command's); read here when None.
    history_limit : int
        Newest history rows read when ``rows`` is None.
    """
    base = f"/models/{model}"
    if rows is None:
        rows = get(f"{base}/drift/history", params={"limit": history_limit})["rows"]
    groups = get(f"{base}/groups", params={"top": 1})["groups"]
    labels = {int(g["group"]): str(g["label"]) for g in groups if g.get("label")}
    # a group merged away keeps its line in the history: its label is the survivor's record
    for group in groups:
        for gone in group.get("merged_labels") or []:
            if gone.get("label") and int(gone["group"]) not in labels:
                labels[int(gone["group"])] = str(gone["label"])
    return PlotInputs(
        rows=list(rows),
        labels=labels,
        alerts=get(f"{base}/drift/alerts", params={"count": 500})["alerts"],
        snapshots=get(f"{base}/snapshots")["snapshots"],
        events=get(f"{base}/events", params={"limit": 500})["events"],
    )


def _row_ids(row: dict[str, Any]) -> list[int]:
    """Group id of each weight of a history row (rows written before ids: 0..K-1)."""
    ids = row.get("group_ids")
    return [int(g) for g in ids] if ids is not None else list(range(len(row["weights"])))


def rollback_text(row: dict[str, Any]) -> str:
    """What a rollback's marker says (the dashboard's hover text has the same words)."""
    replay = "on" if row.get("replay") else "off"
    return f"rolled back to snapshot {row.get('snapshot_id')}, replay {replay}"


def weights_figure(inputs: PlotInputs, title: str, tz: tzinfo | None = None) -> Figure:
    """The weights plot as a matplotlib figure (not yet written anywhere).

    Parameters
    ----------
    inputs : PlotInputs
        History rows and markers.
    title : str
        The figure's title.
    tz : tzinfo, optional
        Time zone of the axis (default: this machine's local zone).

    Raises
    ------
    PlotError
        Without history rows, or without matplotlib.
    """
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.dates as mdates
        from matplotlib.figure import Figure
    except ImportError:
        raise PlotError("--plot needs matplotlib: pip install 'mixroute[plot]'") from None
    rows = inputs.rows
    if not rows:
        raise PlotError("no drift history to plot yet: the model has not written a checkpoint")
    zone = tz or datetime.now().astimezone().tzinfo
    times = [float(row["time"]) for row in rows]
    t0, t1 = times[0], times[-1]
    span = max(t1 - t0, 1e-6)

    def when(seconds: float) -> datetime:
        return datetime.fromtimestamp(seconds, zone)

    def inside(seconds: float) -> bool:
        return t0 - span * EDGE_SHARE <= seconds <= t1 + span * EDGE_SHARE

    def clamp(seconds: float) -> datetime:
        return when(min(max(seconds, t0), t1))

    x = [when(t) for t in times]
    colours = palette()["marks"]
    fig = Figure(figsize=(10, 4.8), layout="constrained")
    ax = fig.add_subplot()

    # one line per group id; NaN where the group did not exist breaks the line there
    ids: list[int] = []
    for row in rows:
        ids.extend(g for g in _row_ids(row) if g not in ids)
    top = 0.0
    for group in ids:
        weights = []
        for row in rows:
            at = _row_ids(row)
            weights.append(float(row["weights"][at.index(group)]) if group in at else math.nan)
        top = max([top, *(w for w in weights if not math.isnan(w))])
        (line,) = ax.plot(
            x,
            weights,
            color=group_colour(group),
            linewidth=1.8,
            drawstyle="steps-post",  # a version's weights hold until the next version
            label=group_name(group, inputs.labels),
        )
        line.set_gid(f"group:{group}")
    ax.set_ylim(0, min(1.0, max(top, 0.01) * 1.18))  # headroom for the markers at the top

    marker_axes = ax.get_xaxis_transform()  # x in data (time), y in axes fractions
    alerts = [
        a for a in inputs.alerts if not str(a["kind"]).startswith("group-") and inside(a["time"])
    ]
    if alerts:
        alert_x = [clamp(float(a["time"])) for a in alerts]
        for at in alert_x:
            ax.axvline(at, color=colours["alert"], linewidth=0.9, linestyle=(0, (4, 3)), alpha=0.8)
        (marks,) = ax.plot(
            alert_x,
            [0.97] * len(alert_x),
            "D",
            color=colours["alert"],
            markersize=6,
            transform=marker_axes,
            clip_on=False,
            linestyle="none",
            label="drift alert",
        )
        marks.set_gid("alerts")

    for kind in EVENT_WORDS:
        events = [e for e in inputs.events if e["kind"] == kind and inside(e["time"])]
        if not events:
            continue
        event_x = [clamp(float(e["time"])) for e in events]
        for at in event_x:
            ax.axvline(at, color="#6b7280", linewidth=0.8, linestyle=(0, (2, 3)))
        (marks,) = ax.plot(
            event_x,
            [0.91] * len(event_x),
            "o",
            color=colours[kind],
            markersize=6,
            markeredgecolor="white",
            transform=marker_axes,
            linestyle="none",
            label=EVENT_WORDS[kind],
        )
        marks.set_gid(f"events:{kind}")

    for kind, words in (("pre-rollback", "pre-rollback snapshot"), ("snapshot", "snapshot")):
        snaps = [
            s
            for s in inputs.snapshots
            if (s["kind"] == "pre-rollback") == (kind == "pre-rollback") and inside(s["created"])
        ]
        if not snaps:
            continue
        (marks,) = ax.plot(
            [clamp(float(s["created"])) for s in snaps],
            [0.0] * len(snaps),
            "|",
            color=colours[kind],
            markersize=14,
            markeredgewidth=2,
            transform=marker_axes,
            clip_on=False,
            linestyle="none",
            label=words,
        )
        marks.set_gid(f"snapshots:{kind}")

    rollbacks = [row for row in rows if row.get("kind") == "rollback"]
    for number, row in enumerate(rollbacks):
        at = when(float(row["time"]))
        rule = ax.axvline(
            at, color=colours["rollback"], linewidth=1.6, label="rollback" if number == 0 else None
        )
        rule.set_gid(f"rollback:{row['version']}")
        # the text on the side with room: left of a rollback in the right part of the plot
        leftwards = (float(row["time"]) - t0) / span > 0.6
        ax.annotate(
            rollback_text(row).replace(", ", "\n"),
            xy=(mdates.date2num(at), 0.84),
            xycoords=marker_axes,
            xytext=(-4 if leftwards else 4, 0),
            textcoords="offset points",
            fontsize=7.5,
            color=colours["rollback"],
            ha="right" if leftwards else "left",
            bbox={
                "boxstyle": "round,pad=0.15",
                "facecolor": "white",
                "edgecolor": "none",
                "alpha": 0.85,
            },
            va="top",
            gid=f"rollback-text:{row['version']}",
        )

    locator = mdates.AutoDateLocator(tz=zone)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, tz=zone))
    ax.set_xlabel(f"checkpoint time ({when(t1).tzname()})")
    ax.set_ylabel("mixture weight")
    ax.set_title(title)
    ax.grid(axis="y", color="#ece4d2")
    ax.legend(loc="upper left", bbox_to_anchor=(1.01, 1.0), fontsize="small", frameon=False)
    return fig


def write_weights_plot(inputs: PlotInputs, path: str | Path, title: str) -> None:
    """Draw :func:`weights_figure` into a PNG file at ``path``.

    Raises
    ------
    PlotError
        Without history rows, or without matplotlib.
    """
    fig = weights_figure(inputs, title)
    fig.savefig(path, dpi=100)
