"""Every Redis key name used by mixroute, in one place.

All keys of one model share the hash tag ``{<model>}``: ``mixroute:{<model>}:<what>``. Redis
Cluster hashes only the text between the braces, so every key of one model lives in one slot
and a MULTI/EXEC or a Lua script over them is legal on a cluster too. The only keys outside a
model's tag are the registry set :data:`REGISTRY_KEY` and the generation counter
:data:`GENERATION_KEY` (each created model takes the next number, so a model re-created under
an old name is told apart from the deleted one by every writer that checks it), and the worker
pool's roster :data:`POOL_MEMBERS_KEY` (``state.lease.PoolRoster``). Those share
the tag ``{_global}`` (one slot of a cluster); no model can be named ``_global`` (names start
with a letter or digit), so no model's keys or SCAN pattern ever meet them. Before the cluster
came they were ``mixroute:models`` and ``mixroute:generation_seq``
(:data:`LEGACY_GLOBAL_KEYS`); :func:`state.registry.adopt_legacy_keys` moves them over.

Keys of model ``M`` (``mixroute:{M}:`` omitted):

=================  ==========  ===========================================================
key                type        what it holds
=================  ==========  ===========================================================
config             string      JSON: MixtureConfig, ModelOptions, creation time, generation
docs               stream      documents: id, text, metadata (JSON), received (unix s);
                               labelled entries: kind, target, group, source, text, received
                               (``state.stream``)
entries_added      string      entries our enqueue ever added to ``docs`` (the count Redis 7
                               reports as ``entries-added``, kept for Redis 6.2)
labelled_queue     zset        stream ids of the labelled entries (corrections, examples,
                               withdrawals) still in ``docs``, scored by their millisecond
                               part: how many are queued past the watermark, without a scan
dead               stream      entries that could not be decoded, with the reason
id:<client id>     string      marks a client id as seen (TTL = idempotency window); the
                               value is its document's stream id (``"1"`` in older keys)
state              string      current state bytes (mixture.serialize)
state_meta         string      JSON summary of the current state (version, weights, checksum,
                               ``entries_read`` when the state's line counts it)
state_checksum     string      checksum of the current state bytes (written with ``version``):
                               the API's poll compares both, so a version number that a
                               failover lost and the worker then re-made is reloaded
version            string      current version number (int)
watermark          string      last stream id applied to the current state
history            list        JSON drift-history rows, one per checkpoint (capped)
lineage            list        JSON version records (version, parent, kind, ...) (capped)
snapshots          zset        snapshot ids scored by the version they copy
snapshot:<id>      hash        ``meta`` (JSON), ``state`` (bytes), ``labels`` (JSON, newer ones),
                               ``label_words`` (JSON, newer still: ``state.snapshots``)
snapshot_seq       string      counter for snapshot ids
alerts             stream      drift alerts: kind, reason, value, threshold, version
heartbeat          string      name of the worker holding the model (TTL = lease)
worker_status      string      JSON status of that worker (same TTL)
replay             string      JSON replay record: the last rollback and the skip rules of
                               every rollback whose entries are still in the stream
notify             channel     pub/sub: the new version after each checkpoint / rollback
labels             hash        operator labels per group: field = group id, value = JSON
labels_version     string      counter bumped by every label change (cheap change check)
label_words        hash        the words each label was given to: field = group id, value =
                               JSON word sketch (``state.label_words.WordSketch``)
label_history      hash        operator label changes per group: field = group id, value =
                               JSON list of the newest records (time, fields, version), capped
routed             stream      messages routed by the intake doors (IMAP, SMTP): id, time,
                               group, label, posterior, review, filed_to (no text; capped)
routed_day:<date>  hash        messages routed that UTC day per group (field = group id;
                               expires after 400 days)
intake:<source>    hash        IMAP intake watermark of one mailbox folder: ``uidvalidity``,
                               ``last_uid`` (the last message filed), ``source`` (label),
                               ``updated``; ``<source>`` is a digest of user, host, folder
=================  ==========  ===========================================================
"""

from __future__ import annotations

import re

from state.errors import OptionsError

PREFIX = "mixroute"
GLOBAL_TAG = "{_global}"  # not a valid model name: never one model's tag
REGISTRY_KEY = f"{PREFIX}:{GLOBAL_TAG}:models"
GENERATION_KEY = f"{PREFIX}:{GLOBAL_TAG}:generation_seq"
# set (with a TTL) only so that WAIT has a write to wait for after a registry write
GLOBAL_REPLICA_FENCE_KEY = f"{PREFIX}:{GLOBAL_TAG}:replica_fence"
# zset of the live members of the worker pool: member name scored by its expiry (Redis ms)
POOL_MEMBERS_KEY = f"{PREFIX}:{GLOBAL_TAG}:pool_members"
# (registry, generation counter) as named before they shared a slot
LEGACY_GLOBAL_KEYS = (f"{PREFIX}:models", f"{PREFIX}:generation_seq")

_MODEL_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.\-]{0,63}")


def validate_model_name(name: str) -> str:
    """Check a model name and return it.

    Parameters
    ----------
    name : str
        1 to 64 characters: letters, digits, ``_``, ``.``, ``-``, starting with a letter or
        digit. Braces, colons and spaces are refused so the hash tag stays exact.

    Returns
    -------
    str
        The name, unchanged.

    Raises
    ------
    OptionsError
        When the name does not match.
    """
    if not isinstance(name, str) or not _MODEL_NAME.fullmatch(name):
        raise OptionsError(
            f"model name {name!r} is invalid: use 1-64 letters, digits, '_', '.' or '-', "
            "starting with a letter or digit"
        )
    return name


class ModelKeys:
    """Key names of one model.

    Parameters
    ----------
    model : str
        A valid model name (see :func:`validate_model_name`).

    Examples
    --------
    >>> ModelKeys("inbox").docs
    'mixroute:{inbox}:docs'
    """

    __slots__ = (
        "alerts",
        "base",
        "config",
        "dead_letters",
        "docs",
        "entries_added",
        "event_counts",
        "events",
        "heartbeat",
        "history",
        "label_history",
        "label_words",
        "labelled_queue",
        "labels",
        "labels_version",
        "lineage",
        "model",
        "notify",
        "replay",
        "replica_fence",
        "routed",
        "snapshot_seq",
        "snapshots",
        "state",
        "state_checksum",
        "state_meta",
        "version",
        "watermark",
        "worker_status",
    )

    def __init__(self, model: str) -> None:
        self.model = validate_model_name(model)
        self.base = f"{PREFIX}:{{{model}}}:"
        b = self.base
        self.config = b + "config"
        self.docs = b + "docs"
        self.entries_added = b + "entries_added"
        self.dead_letters = b + "dead"
        self.state = b + "state"
        self.state_meta = b + "state_meta"
        self.state_checksum = b + "state_checksum"
        self.version = b + "version"
        self.watermark = b + "watermark"
        self.history = b + "history"
        self.lineage = b + "lineage"
        self.snapshots = b + "snapshots"
        self.snapshot_seq = b + "snapshot_seq"
        self.alerts = b + "alerts"
        self.heartbeat = b + "heartbeat"
        self.worker_status = b + "worker_status"
        self.replay = b + "replay"
        self.notify = b + "notify"
        self.labels = b + "labels"
        self.labels_version = b + "labels_version"
        self.label_words = b + "label_words"  # hash group id -> the words its label was given to
        self.label_history = b + "label_history"  # hash group id -> JSON list of label changes
        self.labelled_queue = b + "labelled_queue"
        self.routed = b + "routed"
        self.events = b + "events"  # group events (births, merges, retirements), capped list
        self.event_counts = b + "event_counts"  # hash kind -> events ever written (metrics)
        # set (with a TTL) only so that WAIT has a write to wait for (state.replicas)
        self.replica_fence = b + "replica_fence"

    def fixed(self) -> list[str]:
        """Every key of the model whose name does not depend on an id (not the channel)."""
        return [
            self.config,
            self.docs,
            self.entries_added,
            self.dead_letters,
            self.state,
            self.state_meta,
            self.state_checksum,
            self.version,
            self.watermark,
            self.history,
            self.lineage,
            self.snapshots,
            self.snapshot_seq,
            self.alerts,
            self.heartbeat,
            self.worker_status,
            self.replay,
            self.labels,
            self.labels_version,
            self.label_words,
            self.label_history,
            self.labelled_queue,
            self.routed,
            self.events,
            self.event_counts,
            self.replica_fence,
        ]

    def snapshot(self, snapshot_id: str) -> str:
        """Key of the hash holding one snapshot."""
        return f"{self.base}snapshot:{snapshot_id}"

    def routed_day(self, day: str) -> str:
        """Key of the per-group count of messages routed on one UTC day (``YYYY-MM-DD``)."""
        return f"{self.base}routed_day:{day}"

    def intake_mark(self, source_id: str) -> str:
        """Key of the IMAP intake watermark of one mailbox folder (see state.intake_marks)."""
        return f"{self.base}intake:{source_id}"

    def client_id(self, client_id: str) -> str:
        """Key marking one client-given document id as seen."""
        return f"{self.base}id:{client_id}"

    def pattern(self) -> str:
        """SCAN pattern matching every key of this model and no other model's.

        Glob metacharacters in the name are escaped (``[`` cannot occur; ``-`` and ``.`` are
        literal in glob patterns), and the closing brace ends the tag, so ``{inbox}`` never
        matches ``{inbox2}``.
        """
        return f"{self.base}*"


# PSUBSCRIBE pattern matching every model's ``notify`` channel (names cannot contain "}").
NOTIFY_PATTERN = f"{PREFIX}:{{*}}:notify"


def model_of_notify_channel(channel: str | bytes) -> str | None:
    """The model whose ``notify`` channel ``channel`` is, or None for any other channel."""
    if isinstance(channel, bytes):
        channel = channel.decode(errors="replace")
    head, tail = f"{PREFIX}:{{", "}:notify"
    if not (channel.startswith(head) and channel.endswith(tail)):
        return None
    name = channel[len(head) : -len(tail)]
    return name if _MODEL_NAME.fullmatch(name) else None
