"""The drift history (one row per version), the drift report and the alerts stream."""

from __future__ import annotations

import json

from state.errors import OptionsError, StateError
from state.group_drift import compare_weights, group_ids_of, word_divergence_by_id
from state.handle import ModelHandle
from state.records import Alert, DriftReport, HistoryRow
from state.snapshots import Snapshots
from state.versions import Versions


class DriftHistory:
    """History rows, drift against a window or a snapshot, alerts."""

    def __init__(self, handle: ModelHandle, versions: Versions, snapshots: Snapshots) -> None:
        self.handle = handle
        self.versions = versions
        self.snapshots = snapshots

    def history(self, limit: int | None = None) -> list[HistoryRow]:
        """Drift-history rows, oldest first (the newest ``limit`` when given)."""
        start = 0 if limit is None else -int(limit)
        rows = self.handle.redis.lrange(self.handle.keys.history, start, -1)
        return [HistoryRow.from_dict(json.loads(r)) for r in rows]

    def drift(
        self,
        reference: str | None = None,
        window: int | None = None,
        series_limit: int | None = None,
    ) -> DriftReport:
        """Weight series and divergence of the weights now against a reference.

        Parameters
        ----------
        reference : str, optional
            A snapshot id; adds the per-group word-distribution divergence
            (:func:`mixture.drift.word_drift`, groups aligned). None: the history row
            ``window`` checkpoints back.
        window : int, optional
            Checkpoints back (default ``options.drift_window``).
        series_limit : int, optional
            Newest history rows returned as the weight series (default: all that are kept).

        Raises
        ------
        StateError
            When there is no history yet.
        """
        options = self.handle.options
        window = options.drift_window if window is None else int(window)
        if window < 1:
            raise OptionsError(f"window must be >= 1, got {window}")
        series = self.history()
        summary = self.versions.summary()
        if summary is None:
            raise StateError(f"model {self.handle.model!r} has no state yet")
        now = [float(w) for w in summary["weights"]]
        now_ids = summary.get("group_ids") or list(range(len(now)))
        word_divergence = None
        if reference is None:
            if not series:
                raise StateError(f"model {self.handle.model!r} has no drift history yet")
            # the window never reaches back across a rollback: rows of the current line only
            line = self._current_line(series)
            row = line[max(len(line) - 1 - window, 0)]
            ref, ref_ids = row.weights, row.ids()
            label = f"window:{window}"
        else:
            info = self.snapshots.get(reference)
            label = f"snapshot:{reference}"
            current_state = self.versions.load_state()
            snap_state = self.snapshots.state(reference)
            ref, ref_ids = info.weights, group_ids_of(snap_state)
            if current_state is not None and current_state.warmed_up and snap_state.warmed_up:
                # by id over the full vocabularies, never aligned by position
                word_divergence = word_divergence_by_id(snap_state, current_state)
        compared = compare_weights(now, now_ids, ref, ref_ids)
        value = compared.js_divergence
        return DriftReport(
            reference=label,
            js_divergence=value,
            weights_now=[float(w) for w in compared.now],
            weights_reference=[float(w) for w in compared.reference],
            weight_change=[float(w) for w in compared.now - compared.reference],
            word_divergence=word_divergence,
            threshold=options.drift_threshold,
            alert=value > options.drift_threshold,
            series=series if series_limit is None else series[-int(series_limit) :],
            group_ids=compared.common,
            groups_born=compared.born,
            groups_gone=compared.gone,
        )

    def _current_line(self, series: list[HistoryRow]) -> list[HistoryRow]:
        """The history rows written since the newest rollback (all rows when none)."""
        rollbacks = [r.version for r in self.versions.lineage(1000) if r.kind == "rollback"]
        since = max(rollbacks, default=0)
        line = [row for row in series if row.version >= since]
        return line or series[-1:]

    def alerts(self, count: int = 100) -> list[Alert]:
        """The newest ``count`` alerts, oldest first."""
        entries = self.handle.redis.xrevrange(self.handle.keys.alerts, count=count)
        return [
            Alert(
                id=entry_id.decode(),
                time=float(f.get(b"time", b"0")),
                kind=f.get(b"kind", b"").decode(),
                reason=f.get(b"reason", b"").decode(),
                value=float(f.get(b"value", b"nan")),
                threshold=float(f.get(b"threshold", b"nan")),
                version=int(f.get(b"version", b"0")),
            )
            for entry_id, f in reversed(entries)
        ]

    def alert_count(self) -> int:
        """Number of alerts kept in the alerts stream."""
        return int(self.handle.redis.xlen(self.handle.keys.alerts))
