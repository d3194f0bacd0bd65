"""The service commands of the command line against a live API (uvicorn on loopback) and a
worker on a real Redis: models create, feed, route, describe, snapshot, rollback, drift."""

from __future__ import annotations

import itertools
import json
from collections.abc import Iterator
from pathlib import Path

import httpx
import pytest

from service.app import create_app
from service.cli import main
from service.demo_data import default_days, generate_day
from service.runner import WorkerPool
from service.settings import Settings
from service.testing import QUICK_OPTIONS, learned, uvicorn_thread
from state.keys import ModelKeys

pytestmark = pytest.mark.redis


@pytest.fixture
def live(redis_url: str, model_name: str) -> Iterator[str]:
    settings = Settings(redis_url=redis_url, reload_poll_interval=0.05)
    pool = lambda _runtime: WorkerPool(redis_url, 0.1, models=[model_name])  # noqa: E731
    with uvicorn_thread(create_app(settings, background_factories=[pool])) as url:
        yield url


def write_jsonl(path: Path, records: list[dict]) -> Path:
    path.write_text("".join(json.dumps(r) + "\n" for r in records))
    return path


def test_service_commands(live: str, model_name: str, redis_client, tmp_path: Path, capsys) -> None:
    api = ["--api", live]
    config = json.dumps({"warmup_documents": 120, "n_restarts": 1, "batch_size": 60})
    options = json.dumps(QUICK_OPTIONS)
    create = ["models", "create", model_name, "--groups", "4", "--config", config]
    assert main([*create, "--options", options, *api]) == 0
    assert f"created model {model_name}" in capsys.readouterr().out

    plans = default_days(0.2)
    day1 = [m.to_json() for m in generate_day(plans[0], 6)]
    feed_file = write_jsonl(tmp_path / "day1.jsonl", day1)
    with feed_file.open("a") as handle:
        handle.write("{broken\n")
    assert main(["feed", str(feed_file), "--model", model_name, "--batch", "50", *api]) == 0
    captured = capsys.readouterr()
    assert f"queued {len(day1)} documents" in captured.out
    assert f"line {len(day1) + 1}: not valid JSON" in captured.err
    # the stream ids it queued, as `rollback --skip` wants them: the stream's own first and last
    first_id, last_id = captured.out.split("stream ids ")[1].split(" (")[0].split(" .. ")
    entries = redis_client.xrange(ModelKeys(model_name).docs)
    assert (first_id, last_id) == (entries[0][0].decode(), entries[-1][0].decode())
    # feeding the same ids again queues nothing twice (idempotent client ids)
    assert main(["feed", str(feed_file), "--model", model_name, *api]) == 0
    assert (
        f"queued 0 documents to {model_name} ({len(day1)} already seen" in capsys.readouterr().out
    )

    http = httpx.Client(base_url=live)
    day2 = [m.to_json() for m in generate_day(plans[1], 7)]
    day2_file = write_jsonl(tmp_path / "day2.jsonl", day2)
    assert main(["feed", str(day2_file), "--model", model_name, "--wait", *api]) == 0
    assert "learned through " in capsys.readouterr().out
    assert learned(http, model_name, len(day1) + len(day2))  # --wait returned once learned

    probe = write_jsonl(tmp_path / "probe.jsonl", day1[:5])
    assert main(["route", str(probe), "--model", model_name, "--top", "2", *api]) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert [r["id"] for r in rows] == [r["id"] for r in day1[:5]]
    assert all(len(r["posterior"]) == 2 and "version" in r for r in rows)

    assert main(["describe", "--model", model_name, *api]) == 0
    assert capsys.readouterr().out.count("group ") >= 4

    assert main(["snapshot", "create", "--model", model_name, "--reason", "cli test", *api]) == 0
    created = capsys.readouterr().out
    snap_id = created.split()[1]
    assert "cli test" in created
    assert main(["snapshot", "list", "--model", model_name, *api]) == 0
    assert snap_id in capsys.readouterr().out

    assert main(["rollback", snap_id, "--model", model_name, *api]) == 0
    assert "replay off" in capsys.readouterr().out
    assert main(["rollback", snap_id, "--skip", f"{first_id}..{last_id}", *api]) == 2
    assert "only apply with --replay" in capsys.readouterr().err
    skip = ["--skip", f"{first_id}..{last_id}", "--skip-received", "2026-05-03T14:00..1e10"]
    assert main(["rollback", snap_id, "--replay", *skip, "--model", model_name, *api]) == 0
    assert f"restored snapshot {snap_id}" in capsys.readouterr().out
    assert main(["drift", "--reference", snap_id, "--model", model_name, *api]) == 0
    assert f"vs snapshot:{snap_id}" in capsys.readouterr().out

    assert main(["label", "1", "--label", "lost property", "--model", model_name, *api]) == 0
    assert "label lost property" in capsys.readouterr().out
    assert http.get(f"/models/{model_name}/groups/1").json()["label"] == "lost property"
    nonsense = write_jsonl(tmp_path / "nonsense.jsonl", [{"id": "zz", "text": "qqzx vvkq"}])
    assert main(["route", str(nonsense), "--model", model_name, *api]) == 0
    capsys.readouterr()
    assert main(["flagged", "--model", model_name, *api]) == 0
    flagged = capsys.readouterr().out
    assert flagged.startswith("zz") and "no_known_words: no word of the message" in flagged
    assert main(["rollback", snap_id, "--replay", "--skip", "x", "--model", model_name, *api]) == 2
    assert "FIRST..LAST" in capsys.readouterr().err

    png = tmp_path / "weights.png"
    assert main(["drift", "--model", model_name, "--plot", str(png), *api]) == 0
    out = capsys.readouterr().out
    assert "version" in out and "divergence now" in out
    # the plot is a real PNG image: read back by matplotlib's own reader
    import matplotlib.image

    image = matplotlib.image.imread(png)
    assert image.ndim == 3 and image.shape[0] > 100
    check_plot_of_live_history(http, model_name, snap_id)

    assert main(["models", "list", *api]) == 0
    assert model_name in capsys.readouterr().out
    http.close()


def check_plot_of_live_history(http: httpx.Client, model_name: str, snap_id: str) -> None:
    """The figure `drift --plot` draws, from the rows the API wrote: both rollbacks above
    (replay off, then on) are rows of their own and marked; time never goes back; the label
    set through the command line names group 1 in the legend."""
    from service.plot import fetch_plot_inputs, weights_figure

    inputs = fetch_plot_inputs(lambda path, **kw: http.get(path, **kw).json(), model_name)
    rollbacks = [row for row in inputs.rows if row["kind"] == "rollback"]
    assert [(row["snapshot_id"], row["replay"]) for row in rollbacks] == [
        (snap_id, False),
        (snap_id, True),
    ]
    assert inputs.rows[-1]["group_ids"] == http.get(f"/models/{model_name}").json()["group_ids"]
    ax = weights_figure(inputs, "t").axes[0]
    lines = {line.get_gid(): line for line in ax.get_lines() if line.get_gid()}
    for group in inputs.rows[-1]["group_ids"]:
        xs = list(lines[f"group:{group}"].get_xdata())
        assert all(a <= b for a, b in itertools.pairwise(xs)) and len(xs) > 2
    assert {f"rollback:{row['version']}" for row in rollbacks} <= set(lines)
    assert {"snapshots:snapshot", "snapshots:pre-rollback"} <= set(lines)
    legend = [text.get_text() for text in ax.get_legend().get_texts()]
    assert "1 · lost property" in legend and "rollback" in legend


def test_unreachable_api_and_unknown_model_are_one_line_errors(
    live: str, tmp_path: Path, capsys
) -> None:
    docs = write_jsonl(tmp_path / "d.jsonl", [{"id": "1", "text": "ferry"}])
    assert main(["feed", str(docs), "--model", "no-such-model", "--api", live]) == 1
    err = capsys.readouterr().err
    assert "404" in err and "no-such-model" in err and "Traceback" not in err
    assert main(["feed", str(docs), "--api", "http://127.0.0.1:9"]) == 1
    assert "cannot reach the mixroute API" in capsys.readouterr().err


def test_work_without_redis_url_explains(monkeypatch, capsys) -> None:
    monkeypatch.delenv("REDIS_URL", raising=False)
    monkeypatch.delenv("MIXROUTE_REDIS_URL", raising=False)
    assert main(["work"]) == 2
    assert "needs a Redis" in capsys.readouterr().err


def test_command_line_sends_the_configured_key(redis_url: str, monkeypatch, capsys) -> None:
    admin_key = "cli-test-admin-key-0123456789"
    settings = Settings(redis_url=redis_url, api_keys_admin=admin_key)
    with uvicorn_thread(create_app(settings)) as url:
        monkeypatch.delenv("MIXROUTE_API_KEY", raising=False)
        assert main(["models", "list", "--api", url]) == 1
        assert "set MIXROUTE_API_KEY" in capsys.readouterr().err
        monkeypatch.setenv("MIXROUTE_API_KEY", admin_key)
        assert main(["models", "list", "--api", url]) == 0
        err = capsys.readouterr().err
        assert admin_key not in err
