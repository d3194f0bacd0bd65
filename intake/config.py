"""What the IMAP intake and the SMTP door are told: plain validated dataclasses.

The values come from the service's settings (``service/settings.py``, ``MIXROUTE_INTAKE_*``);
this layer never reads the environment itself.
"""

from __future__ import annotations

import ipaddress
import socket
from dataclasses import dataclass, field

from mixture.errors import ConfigError

FILING_MODES = ("move", "keyword", "none")
SECURITY_MODES = ("tls", "starttls", "plain")


def is_loopback(host: str) -> bool:
    """True for ``localhost`` and loopback addresses (plain IMAP is allowed there)."""
    if host.lower() in ("localhost", "localhost.localdomain"):
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        pass
    try:
        infos = socket.getaddrinfo(host, None)
    except OSError:
        return False
    return bool(infos) and all(ipaddress.ip_address(info[4][0]).is_loopback for info in infos)


@dataclass(frozen=True)
class ImapConfig:
    """Where the mailbox is and how its messages are filed.

    Parameters
    ----------
    host, user, password
        The server and the account; ``password`` never appears in a repr or a log line.
    port
        None: 993 with ``security="tls"``, else 143.
    folder
        The folder watched for new mail.
    security
        ``tls`` (implicit TLS, the default), ``starttls``, or ``plain`` (no encryption: only
        to a loopback address, or with ``allow_plain``).
    filing
        ``move`` (to a folder per group, created when missing), ``keyword`` (a keyword per
        group on the message, which stays), or ``none`` (left as it is).
    review_folder
        Messages routed with review true go here (``move``) or get keyword
        ``<keyword_prefix>review``; None files them like the others.
    folder_prefix
        Put before every destination folder name (e.g. ``"Routed."``; the server's hierarchy
        separator is the operator's to choose).
    keyword_prefix
        Put before every keyword.
    poll_seconds
        Between checks when the server has no IDLE (or while the model has no checkpoint yet).
    idle_seconds
        Longest single IDLE before it is renewed (RFC 2177 asks clients to renew within 29
        minutes).
    batch
        Messages handled per round before the folder is checked again.
    ca_file
        PEM file of the certificate authorities to trust instead of the system's (a private
        CA); the server's certificate and host name are always checked.
    """

    host: str
    user: str
    password: str = field(repr=False)
    port: int | None = None
    folder: str = "INBOX"
    security: str = "tls"
    allow_plain: bool = False
    filing: str = "move"
    review_folder: str | None = "Review"
    folder_prefix: str = ""
    keyword_prefix: str = "mixroute-"
    poll_seconds: float = 30.0
    idle_seconds: float = 300.0
    use_idle: bool = True
    batch: int = 100
    timeout_seconds: float = 60.0
    backoff_initial: float = 0.5
    backoff_max: float = 60.0
    strip_quotes: bool = True
    review_unknown_share: float = 0.5
    ca_file: str | None = None

    def __post_init__(self) -> None:
        if not self.host or not self.user:
            raise ConfigError("intake: imap_host and imap_user are required")
        if self.security not in SECURITY_MODES:
            raise ConfigError(f"imap_security must be one of {SECURITY_MODES}")
        if self.filing not in FILING_MODES:
            raise ConfigError(f"filing must be one of {FILING_MODES}")
        if self.security == "plain" and not self.allow_plain and not is_loopback(self.host):
            raise ConfigError(
                f"imap_security=plain sends the password unencrypted to {self.host}: allowed "
                "only to a loopback address, or with imap_allow_plain=true"
            )
        if self.port is not None and not 1 <= self.port <= 65535:
            raise ConfigError("imap_port must be in [1, 65535]")
        for name in ("poll_seconds", "idle_seconds", "timeout_seconds", "backoff_initial"):
            if not getattr(self, name) > 0:
                raise ConfigError(f"{name} must be > 0")
        if self.idle_seconds > 29 * 60:
            raise ConfigError("idle_seconds must be at most 1740 (RFC 2177: 29 minutes)")
        if self.batch < 1:
            raise ConfigError("batch must be >= 1")

    @property
    def effective_port(self) -> int:
        return self.port or (993 if self.security == "tls" else 143)

    @property
    def label(self) -> str:
        """``user@host:port/folder``: names the watched folder (no credential)."""
        return f"{self.user}@{self.host}:{self.effective_port}/{self.folder}"
