"""``REDIS_URL=redis://... python -m worker --model NAME``: one learner process.

SIGTERM and SIGINT finish the current batch, checkpoint, release the lease and exit 0.
Log lines follow the API's settings: ``MIXROUTE_LOG_FORMAT`` (json, the default, or text),
``MIXROUTE_LOG_LEVEL``, and the keys of ``MIXROUTE_API_KEYS_READ`` / ``_ADMIN`` are redacted.
"""

from __future__ import annotations

import argparse
import logging
import os
import signal
import sys
from types import FrameType

from mixture.sweep import set_worker_threads
from state.connection import redis_from_url
from state.errors import ModelNotFoundError
from state.logs import configure_logging
from state.replicas import require_replicas, requirement_from_environment
from worker.learner import Worker


def main(argv: list[str] | None = None) -> int:
    """Run one worker until SIGTERM/SIGINT; returns the exit status."""
    parser = argparse.ArgumentParser(prog="python -m worker", description=__doc__)
    parser.add_argument("--model", required=True, help="registered model name")
    parser.add_argument("--name", default=None, help="lease name (default <host>:<pid>:<random>)")
    parser.add_argument(
        "--redis-url", default=os.environ.get("REDIS_URL"), help="Redis URL (default: $REDIS_URL)"
    )
    parser.add_argument(
        "--redis-cluster",
        action=argparse.BooleanOptionalAction,
        # the worker sits below the service layer: it reads the service's variable itself
        default=os.environ.get("MIXROUTE_REDIS_CLUSTER", "").strip().lower()
        in ("1", "true", "yes", "on"),
        help="the Redis URL names a Redis Cluster node (default: $MIXROUTE_REDIS_CLUSTER)",
    )
    parser.add_argument("--log-level", default=os.environ.get("MIXROUTE_LOG_LEVEL", "INFO"))
    parser.add_argument(
        "--log-format",
        default=os.environ.get("MIXROUTE_LOG_FORMAT", "json"),
        help="json (one object a line) or text (default: $MIXROUTE_LOG_FORMAT, else json)",
    )
    parser.add_argument(
        "--threads",
        type=int,
        default=os.environ.get("MIXROUTE_MODEL_THREADS"),
        help="threads of the model core for batch EM fits (default: $MIXROUTE_MODEL_THREADS, "
        "else the CPUs this process may run on, at most 8)",
    )
    args = parser.parse_args(argv)
    if args.threads is not None:
        threads = int(args.threads)
        if threads < 1:
            parser.error(f"--threads must be >= 1; got {threads}")
        set_worker_threads(threads)
    log_format = str(args.log_format).strip().lower()
    if log_format not in ("json", "text"):
        parser.error(f"--log-format / MIXROUTE_LOG_FORMAT must be json or text; got {log_format!r}")
    configure_logging(args.log_level, log_format, secrets=_configured_keys())
    if not args.redis_url:
        parser.error(
            "no Redis: set REDIS_URL or pass --redis-url (a worker process needs the "
            "shared Redis; the embedded server runs workers in-process)"
        )
    try:  # the service's durability setting (checkpoints wait for the replicas)
        requirement = requirement_from_environment(os.environ)
    except ValueError as exc:
        parser.error(str(exc))
    require_replicas(requirement.replicas, requirement.timeout_seconds)
    client = redis_from_url(args.redis_url, cluster=args.redis_cluster)
    try:
        worker = Worker(client, args.model, name=args.name)
    except ModelNotFoundError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2

    def _on_signal(signum: int, frame: FrameType | None) -> None:
        logging.getLogger("worker").info("signal %d: finishing the batch", signum)
        worker.stop()

    signal.signal(signal.SIGTERM, _on_signal)
    signal.signal(signal.SIGINT, _on_signal)
    worker.run()
    return 0


def _configured_keys() -> list[str]:
    """The API keys of the environment (the same variables the API reads), to redact."""
    raw = ",".join(
        os.environ.get(name, "") for name in ("MIXROUTE_API_KEYS_READ", "MIXROUTE_API_KEYS_ADMIN")
    )
    return [part.strip() for part in raw.split(",") if part.strip()]


if __name__ == "__main__":
    sys.exit(main())
