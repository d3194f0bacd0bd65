"""Operator labels and destinations per group, with a counter every change bumps (so each API
process re-reads the labels only when the counter moved)."""

from __future__ import annotations

import json
import time

import redis

from state.errors import OptionsError, VersionConflictError
from state.handle import ModelHandle
from state.records import GroupLabel, dumps


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

    def set(self, group: int, label: str | None, destination: str | None) -> GroupLabel:
        """Set (or, with both None, clear) the label and destination of one group.

        Raises
        ------
        OptionsError
            When ``group`` is not the id of a current group (0..K-1 before the first
            checkpoint) or a text is empty or longer than 200 characters.
        ModelNotFoundError
            When the model was deleted (nothing is written).
        """
        ids = self.current_ids()
        if isinstance(group, bool) or not isinstance(group, int) or group not in ids:
            raise OptionsError(f"group must be the id of a current group {ids}, got {group!r}")
        for name, value in (("label", label), ("destination", destination)):
            if value is not None and (
                not isinstance(value, str) or not value.strip() or len(value) > 200
            ):
                raise OptionsError(f"{name} must be 1-200 characters or null")
        record = GroupLabel(group, label, destination, time.time())
        keys = self.handle.keys
        for _ in range(20):
            with self.handle.redis.pipeline(transaction=True) as pipe:
                try:  # WATCH config: a label set racing a delete leaves nothing behind
                    pipe.watch(keys.config, keys.labels_version)
                    self.handle.check_alive(pipe.get(keys.config))
                    old = pipe.hget(keys.labels, str(group))
                    merged = json.loads(old).get("merged_labels") if old else None
                    record = GroupLabel(group, label, destination, time.time(), merged)
                    pipe.multi()
                    if label is None and destination is None and not merged:
                        pipe.hdel(keys.labels, str(group))
                    else:  # the absorbed groups' labels stay with the survivor
                        pipe.hset(keys.labels, str(group), dumps(record.to_dict()))
                    pipe.incr(keys.labels_version)
                    pipe.execute()
                    return record
                except redis.WatchError:
                    continue
        raise VersionConflictError(f"labels of model {self.handle.model!r} kept changing")
