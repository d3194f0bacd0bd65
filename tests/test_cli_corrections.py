"""`mixroute correct`, `mixroute examples` and `models create --seeds` against a live API
(uvicorn on loopback) and a worker on a real Redis. What the worker learns is checked against
the model core in tests/test_worker_corrections.py; here the commands' effect is read back
from the API and the stream. Messages are invented (tests/worker_support.py's ferry inbox)."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from service.app import create_app
from service.cli import main
from service.runner import WorkerPool
from service.settings import Settings
from service.testing import QUICK_OPTIONS, learned, uvicorn_thread, wait_until
from state.stream import example_id
from tests.worker_support import ferry_texts

pytestmark = pytest.mark.redis


@pytest.fixture
def live(redis_url: str, model_name: str) -> Iterator[str]:
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    pool = lambda _runtime: WorkerPool(redis_url, 0.1, models=[model_name])  # noqa: E731
    with uvicorn_thread(create_app(settings, background_factories=[pool])) as url:
        yield url


def test_correct_examples_and_seeds_from_the_command_line(
    live: str, model_name: str, tmp_path: Path, capsys
) -> None:
    api = ["--api", live]
    seeds = tmp_path / "seeds.jsonl"
    seeds.write_text(
        json.dumps({"label": "Refunds", "examples": ["refund my fare", "cancel ticket refund"]})
        + "\n"
    )
    config = json.dumps({"warmup_documents": 200, "n_restarts": 1, "batch_size": 50})
    options = json.dumps({**QUICK_OPTIONS, "flush_partial_seconds": None})
    create = ["models", "create", model_name, "--groups", "3", "--config", config]
    assert main([*create, "--options", options, "--seeds", str(seeds), *api]) == 0
    out = capsys.readouterr().out
    assert "group 0 [Refunds]: 2 examples queued" in out
    texts = ferry_texts(300, seed=2)
    docs = tmp_path / "docs.jsonl"
    docs.write_text(
        "".join(json.dumps({"id": f"m-{i}", "text": t}) + "\n" for i, t in enumerate(texts))
    )
    assert main(["feed", str(docs), "--model", model_name, "--wait", *api]) == 0
    http = httpx.Client(base_url=live)
    assert learned(http, model_name, 300)
    capsys.readouterr()
    # one message by id (its text is found in the stream)
    assert main(["correct", "--id", "m-3", "--group", "1", "--model", model_name, *api]) == 0
    out = capsys.readouterr().out
    assert "m-3 -> group 1 queued as" in out and "text from stream" in out
    assert "already learned unlabelled, weight remaining" in out
    # a file of corrections
    file = tmp_path / "corrections.jsonl"
    file.write_text(
        json.dumps({"id": "m-4", "group": 2})
        + "\n\n"
        + json.dumps({"id": "new-1", "group": 1, "text": "lost bag on deck"})
        + "\n"
    )
    assert main(["correct", "--file", str(file), "--model", model_name, *api]) == 0
    assert capsys.readouterr().out.count(" queued as ") == 2
    # examples of a group
    assert main(["examples", "2", "storm delay harbour", "--model", model_name, *api]) == 0
    assert example_id(2, "storm delay harbour") in capsys.readouterr().out

    def held() -> list[str]:
        return [d["id"] for d in http.get(f"/models/{model_name}/corrections").json()["documents"]]

    expected = [
        example_id(0, "refund my fare"),
        example_id(0, "cancel ticket refund"),
        "m-3",
        "m-4",
        "new-1",
        example_id(2, "storm delay harbour"),
    ]
    wait_until(lambda: held() == expected, 60, what="the corrections learned")
    assert main(["correct", "--list", "--model", model_name, *api]) == 0
    assert "6 labelled documents (group 0: 2, group 1: 2, group 2: 2); 0 queued" in (
        capsys.readouterr().out
    )
    assert main(["correct", "--withdraw", "m-4", "--model", model_name, *api]) == 0
    assert "withdrawal of m-4 queued" in capsys.readouterr().out
    wait_until(lambda: "m-4" not in held(), 60, what="the withdrawal learned")
    # refusals: a bad line names the file and line, nothing is sent; the API's 422 is shown
    file.write_text(json.dumps({"id": "x", "group": "one"}) + "\n")
    assert main(["correct", "--file", str(file), "--model", model_name, *api]) == 2
    assert f"{file}:1: 'group' must be an integer" in capsys.readouterr().err
    assert main(["correct", "--id", "nowhere", "--group", "0", "--model", model_name, *api]) == 1
    assert "documents.0.text" in capsys.readouterr().err
    assert main(["correct", "--model", model_name, *api]) == 2
    assert "give one of" in capsys.readouterr().err
