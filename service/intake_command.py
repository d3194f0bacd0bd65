"""``mixroute intake``: the IMAP intake as a process (settings, logging, signals).

The work itself is :class:`intake.imap.ImapIntake`; this module only builds it from the
settings (``MIXROUTE_INTAKE_*``, see :class:`service.settings.IntakeSettings`).
"""

from __future__ import annotations

import logging
import signal
from types import FrameType

from intake.config import ImapConfig
from intake.smtp_door import SmtpDoorConfig
from service.logs import configure_logging
from service.settings import IntakeSettings, load_settings

log = logging.getLogger(__name__)


def imap_config_from_settings(settings: IntakeSettings, review_unknown_share: float) -> ImapConfig:
    """The intake's :class:`intake.config.ImapConfig` from the settings (ConfigError if bad)."""
    return ImapConfig(
        host=settings.imap_host,
        user=settings.imap_user,
        password=settings.password(),
        port=settings.imap_port,
        folder=settings.imap_folder,
        security=settings.imap_security,
        allow_plain=settings.imap_allow_plain,
        filing=settings.filing,
        review_folder=settings.review_folder or None,
        folder_prefix=settings.folder_prefix,
        keyword_prefix=settings.keyword_prefix,
        poll_seconds=settings.poll_seconds,
        idle_seconds=settings.idle_seconds,
        use_idle=settings.use_idle,
        strip_quotes=not settings.keep_quotes,
        review_unknown_share=review_unknown_share,
        ca_file=str(settings.imap_ca_file) if settings.imap_ca_file else None,
    )


def smtp_config_from_settings(
    settings: IntakeSettings, review_unknown_share: float
) -> SmtpDoorConfig:
    """The SMTP door's configuration from the settings (ConfigError if bad)."""
    return SmtpDoorConfig(
        listen_host=settings.smtp_listen_host,
        listen_port=settings.smtp_listen_port,
        relay_host=settings.smtp_relay_host,
        relay_port=settings.smtp_relay_port,
        relay_security=settings.smtp_relay_security,
        relay_user=settings.smtp_relay_user,
        relay_password=settings.smtp_relay_password.get_secret_value(),
        review_address=settings.smtp_review_address or None,
        fallback_address=settings.smtp_fallback_address or None,
        strip_quotes=not settings.keep_quotes,
        review_unknown_share=review_unknown_share,
    )


def run_smtp_door(model: str | None = None) -> int:
    """Run the SMTP door until SIGTERM/SIGINT; exit status."""
    import threading

    from intake.smtp_door import start_door
    from service.cli import CommandError
    from state.connection import redis_from_url
    from state.registry import Registry

    settings = load_settings()
    intake_settings = IntakeSettings()
    if not settings.redis_url:
        raise CommandError("`mixroute intake --smtp` needs the model's Redis: set REDIS_URL", 2)
    config = smtp_config_from_settings(intake_settings, settings.review_unknown_share)
    secrets = [config.relay_password] if config.relay_password else []
    configure_logging(settings.log_level, settings.log_format, secrets)
    name = model or intake_settings.model or settings.default_model
    client = redis_from_url(settings.redis_url)
    Registry(client).get(name)
    controller = start_door(client, name, config)
    done = threading.Event()

    def on_signal(signum: int, frame: FrameType | None) -> None:
        log.info("signal %d: closing the SMTP door", signum)
        done.set()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    done.wait()
    controller.stop()
    return 0


def run_intake(model: str | None = None, *, once: bool = False) -> int:
    """Run the IMAP intake until SIGTERM/SIGINT (or, with ``once``, until the folder is
    filed); exit status."""
    from intake.imap import ImapIntake
    from service.cli import CommandError
    from state.connection import redis_from_url
    from state.registry import Registry

    settings = load_settings()
    intake_settings = IntakeSettings()
    if not settings.redis_url:
        raise CommandError(
            "`mixroute intake` needs the model's Redis: set REDIS_URL (or MIXROUTE_REDIS_URL)", 2
        )
    if not intake_settings.imap_host or not intake_settings.imap_user:
        raise CommandError("set MIXROUTE_INTAKE_IMAP_HOST and MIXROUTE_INTAKE_IMAP_USER", 2)
    try:
        config = imap_config_from_settings(intake_settings, settings.review_unknown_share)
    except OSError as exc:
        raise CommandError(
            f"cannot read the IMAP password file: {exc.strerror or exc}", 2
        ) from None
    password = intake_settings.password()
    secrets = [password] if password else []
    configure_logging(settings.log_level, settings.log_format, secrets)
    name = model or intake_settings.model or settings.default_model
    client = redis_from_url(settings.redis_url)
    Registry(client).get(name)  # ModelNotFoundError: a one-line error
    intake = ImapIntake(client, name, config)
    if once:
        intake.run_until_idle()
        note = ""
        if intake.unreadable:
            note += f", {intake.unreadable} unreadable left in place"
        if intake.waiting_for_model:
            note += "; the model has no checkpoint yet: new mail queued for learning, not filed"
        print(f"filed {intake.filed} message(s) from {config.label}{note}")
        return 0

    def on_signal(signum: int, frame: FrameType | None) -> None:
        log.info("signal %d: stopping the intake after the message in hand", signum)
        intake.stop()

    signal.signal(signal.SIGTERM, on_signal)
    signal.signal(signal.SIGINT, on_signal)
    intake.run()
    return 0
