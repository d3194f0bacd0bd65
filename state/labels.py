"""Operator labels and destinations per group, with a counter every change bumps (so each API
process re-reads the labels only when the counter moved).

Three writes, each one MULTI under WATCH of ``config`` (a write racing a delete, or a model
re-created under the name, leaves nothing) and ``labels_version``:

* :meth:`GroupLabels.set` (HTTP PUT): the label and destination are replaced whole; a field
  left out is cleared;
* :meth:`GroupLabels.patch` (HTTP PATCH): only the fields given change;
* both with both fields empty clear the label.

Each write also appends one record to the group's label history (``label_history``, the newest
:data:`LABEL_HISTORY_LIMIT` per group: time, action, the fields given, the result, the model
version) and stores or keeps the words the label was given to (``label_words``, a
:class:`state.label_words.WordSketch` the caller computes from the state it serves): a
replacement stores the sketch given (or none), a patch keeps the old one unless it is given a
new one, a clear removes it. All of it is in the model's hash slot and unlinked with the model.
"""

from __future__ import annotations

import json
import time
from collections.abc import Mapping
from typing import Any

import redis

from state.errors import OptionsError, VersionConflictError
from state.handle import ModelHandle
from state.label_words import WordSketch, parse_sketches
from state.records import GroupLabel, dumps

LABEL_HISTORY_LIMIT = 50  # records kept per group (the newest)
LABEL_FIELDS = ("label", "destination")


class GroupLabels:
    """Read and set the labels of one model's groups."""

    def __init__(self, handle: ModelHandle) -> None:
        self.handle = handle

    def all(self) -> dict[int, GroupLabel]:
        """Operator labels by group id (groups without one are absent)."""
        out: dict[int, GroupLabel] = {}
        for field_name, raw in self.handle.redis.hgetall(self.handle.keys.labels).items():
            group = int(field_name)
            out[group] = GroupLabel.from_dict(group, json.loads(raw))
        return dict(sorted(out.items()))

    def sketches(self) -> dict[int, WordSketch]:
        """The words each label was given to, by group id (labels without a record absent)."""
        return parse_sketches(self.handle.redis.hgetall(self.handle.keys.label_words))

    def history(self, group: int) -> list[dict[str, Any]]:
        """The label changes of one group, oldest first (the newest LABEL_HISTORY_LIMIT)."""
        raw = self.handle.redis.hget(self.handle.keys.label_history, str(group))
        return list(json.loads(raw)) if raw else []

    def current_ids(self) -> list[int]:
        """Ids of the current groups (from the state summary; 0..K-1 before a checkpoint)."""
        raw = self.handle.redis.get(self.handle.keys.state_meta)
        ids = json.loads(raw).get("group_ids") if raw else None
        if ids is None:
            return list(range(self.handle.info.config.n_groups))
        return [int(g) for g in ids]

    def version(self) -> int:
        """Counter bumped by every label change (compare it to skip re-reading the labels)."""
        raw = self.handle.redis.get(self.handle.keys.labels_version)
        return int(raw) if raw else 0

    def set(
        self,
        group: int,
        label: str | None,
        destination: str | None,
        sketch: WordSketch | None = None,
    ) -> GroupLabel:
        """Replace the label and destination of one group (both None: clear).

        Parameters
        ----------
        group : int
            A current group id.
        label, destination : str or None
            The new values; None clears that field.
        sketch : WordSketch, optional
            The group's words now (stored as what the label was given to; None stores none).

        Raises
        ------
        OptionsError
            When ``group`` is not the id of a current group (0..K-1 before the first
            checkpoint) or a text is empty or longer than 200 characters.
        ModelNotFoundError
            When the model was deleted (nothing is written).
        """
        changes = {"label": label, "destination": destination}
        return self._write(group, changes, sketch, replace=True)

    def patch(
        self,
        group: int,
        changes: Mapping[str, str | None],
        sketch: WordSketch | None = None,
    ) -> GroupLabel:
        """Change only the fields in ``changes`` (``label``, ``destination``; None clears one).

        ``sketch`` given: stored as the words the label is given to from now on (a refresh);
        None keeps the one recorded before. Raises as :meth:`set`, and :class:`OptionsError`
        for a field other than ``label`` and ``destination``.
        """
        unknown = sorted(set(changes) - set(LABEL_FIELDS))
        if unknown:
            raise OptionsError(f"a label has only the fields label and destination, not {unknown}")
        return self._write(group, dict(changes), sketch, replace=False)

    def _write(
        self,
        group: int,
        changes: dict[str, str | None],
        sketch: WordSketch | None,
        *,
        replace: bool,
    ) -> GroupLabel:
        ids = self.current_ids()
        if isinstance(group, bool) or not isinstance(group, int) or group not in ids:
            raise OptionsError(f"group must be the id of a current group {ids}, got {group!r}")
        for name, value in changes.items():
            if value is not None and (
                not isinstance(value, str) or not value.strip() or len(value) > 200
            ):
                raise OptionsError(f"{name} must be 1-200 characters or null")
        keys = self.handle.keys
        field_name = str(group)
        for _ in range(20):
            with self.handle.redis.pipeline(transaction=True) as pipe:
                try:  # WATCH config: a label set racing a delete leaves nothing behind
                    pipe.watch(keys.config, keys.labels_version)
                    self.handle.check_alive(pipe.get(keys.config))
                    old_raw = pipe.hget(keys.labels, field_name)
                    old = json.loads(old_raw) if old_raw else {}
                    raw_version = pipe.get(keys.version)
                    raw_history = pipe.hget(keys.label_history, field_name)
                    values = {} if replace else {f: old.get(f) for f in LABEL_FIELDS}
                    values.update(changes)
                    label, destination = values.get("label"), values.get("destination")
                    merged = old.get("merged_labels")
                    now = time.time()
                    record = GroupLabel(group, label, destination, now, merged)
                    cleared = label is None and destination is None
                    history = json.loads(raw_history) if raw_history else []
                    history.append(
                        {
                            "time": now,
                            "action": "clear" if cleared else ("set" if replace else "patch"),
                            "fields": dict(changes),
                            "label": label,
                            "destination": destination,
                            "version": int(raw_version) if raw_version else 0,
                            "words_recorded": sketch is not None and not cleared,
                        }
                    )
                    pipe.multi()
                    if cleared and not merged:
                        pipe.hdel(keys.labels, field_name)
                    else:  # the absorbed groups' labels stay with the survivor
                        pipe.hset(keys.labels, field_name, dumps(record.to_dict()))
                    if cleared or (replace and sketch is None):
                        pipe.hdel(keys.label_words, field_name)
                    elif sketch is not None:
                        pipe.hset(keys.label_words, field_name, sketch.to_json())
                    pipe.hset(keys.label_history, field_name, dumps(history[-LABEL_HISTORY_LIMIT:]))
                    pipe.incr(keys.labels_version)
                    pipe.execute()
                    return record
                except redis.WatchError:
                    continue
        raise VersionConflictError(f"labels of model {self.handle.model!r} kept changing")
