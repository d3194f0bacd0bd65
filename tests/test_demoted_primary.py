"""A Redis that turned read-only under mixroute (a primary demoted to a replica by a failover)
refuses each write whole: the API answers 503 saying nothing was changed, and the worker
retries as after a lost connection instead of logging an unexpected error.

A real primary with one replica (tests/cluster_support.py ``LocalReplicated``, the machine's
redis-server on loopback ports); the API and the worker are pointed at the replica. The
reference is Redis's own: a replica refuses writes with ``-READONLY You can't write against a
read only replica`` (Redis documentation of ``replica-read-only``, on by default), which
redis-py raises as ``ReadOnlyError``. A failover that demotes the primary a client still
talks to gives that reply (a cluster node answers MOVED first, the same transient refusal).
"""

from __future__ import annotations

import logging
import smtplib
import threading
import time
import warnings
from collections.abc import Iterator
from pathlib import Path

import pytest
import redis

from service.app import create_app
from service.settings import Settings
from state.connection import REDIS_TRANSIENT_ERRORS, redis_from_url
from state.keys import ModelKeys
from state.registry import Registry
from tests.cluster_support import LocalReplicated, cluster_binaries
from tests.worker_support import create_model, small_config
from worker.learner import Worker

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

pytestmark = [
    pytest.mark.redis,
    pytest.mark.skipif(cluster_binaries() is None, reason="needs redis-server"),
]

MODEL = "demoted-inbox"


@pytest.fixture(scope="module")
def pair(tmp_path_factory: pytest.TempPathFactory) -> Iterator[LocalReplicated]:
    servers = LocalReplicated(Path(tmp_path_factory.mktemp("demoted"))).start()
    yield servers
    servers.stop()


def replica_url(pair: LocalReplicated) -> str:
    return f"redis://127.0.0.1:{pair.replica_port}/0"


def test_a_write_to_a_replica_is_refused_with_a_transient_error(pair: LocalReplicated) -> None:
    replica = redis_from_url(replica_url(pair))
    with pytest.raises(redis.exceptions.ReadOnlyError) as caught:
        replica.set("demoted-probe", "1")
    assert isinstance(caught.value, REDIS_TRANSIENT_ERRORS)
    assert replica.get("demoted-probe") is None
    replica.close()


def test_the_api_answers_503_and_the_worker_retries_on_a_read_only_redis(
    pair: LocalReplicated, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.INFO, logger="worker.learner")
    primary = redis_from_url(pair.url)
    create_model(primary, MODEL, small_config())
    pair.wait_in_sync()
    assert primary.execute_command("WAIT", 1, 10_000) == 1  # the model is on the replica
    replica = redis_from_url(replica_url(pair))
    try:
        settings = Settings(redis_url=replica_url(pair), reload_poll_interval=60)
        with TestClient(create_app(settings)) as http:
            assert http.get(f"/models/{MODEL}").status_code == 200  # reads are served
            answer = http.post(
                f"/models/{MODEL}/documents",
                json={"documents": [{"id": "d-1", "text": "is the morning ferry late"}]},
            )
            assert answer.status_code == 503, answer.text
            assert "nothing was changed" in answer.json()["detail"]
            assert answer.headers["retry-after"] == "1"
        assert replica.xlen(ModelKeys(MODEL).docs) == 0 and primary.xlen(ModelKeys(MODEL).docs) == 0

        worker = Worker(redis_from_url(replica_url(pair)), MODEL)
        thread = threading.Thread(target=worker.run, daemon=True)
        thread.start()
        deadline = time.monotonic() + 20
        while worker.reconnects < 1 and time.monotonic() < deadline:
            time.sleep(0.05)
        worker.stop()
        thread.join(20)
        assert worker.reconnects >= 1, "the worker never met the read-only refusal"
        assert worker.errors == 0, [r.getMessage() for r in caplog.records if r.exc_info]
        lost = [r.getMessage() for r in caplog.records if "lost Redis" in r.getMessage()]
        assert any("ReadOnlyError" in message for message in lost), lost
    finally:
        Registry(primary).delete(MODEL)
        primary.close()
        replica.close()


def test_the_smtp_door_answers_451_on_a_read_only_redis(pair: LocalReplicated) -> None:
    """RFC 5321 4.2.5: a 4yz reply is a transient failure (the sending MTA keeps the mail and
    retries); a 5yz would bounce it. A READONLY refusal is transient."""
    pytest.importorskip("aiosmtpd")
    from intake.compose import MailDraft, compose
    from intake.smtp_door import SmtpDoorConfig, start_door
    from mixture.config import MixtureConfig
    from mixture.em import fit_texts
    from service.testing import free_port
    from tests.test_intake_smtp import _messages, _send, _setup

    messages = _messages(300, seed=5)
    state, _ = fit_texts([m.text for m in messages], MixtureConfig(n_groups=4), seed=1)
    primary = redis_from_url(pair.url)
    name = "demoted-door"
    _setup(primary, name, state)
    assert primary.execute_command("WAIT", 1, 10_000) == 1
    replica = redis_from_url(replica_url(pair))
    config = SmtpDoorConfig(listen_port=free_port(), relay_port=free_port(), relay_security="plain")
    controller = start_door(replica, name, config)
    try:
        raw = compose(MailDraft("ro-1@x.invalid", messages[0].text, 1.7e9)).as_bytes()
        with pytest.raises(smtplib.SMTPDataError) as refused:
            _send(config.listen_port, raw)
        assert refused.value.smtp_code == 451, refused.value
        assert primary.xlen(ModelKeys(name).docs) == 0
    finally:
        controller.stop()
        Registry(primary).delete(name)
        primary.close()
        replica.close()
