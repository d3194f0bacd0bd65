"""The ``mixroute`` command line.

Offline commands work on model files and JSON-lines files with the model core alone::

    mixroute fit DOCS.jsonl --groups K --out MODEL
    mixroute route MODEL DOCS.jsonl            # MODEL is a file written by `fit`
    mixroute describe MODEL

Service commands talk to Redis or to a running API (``--api``, default from the settings)::

    mixroute serve                              # API + worker; embedded Redis without REDIS_URL
    mixroute work --model NAME                  # one worker alone (needs REDIS_URL)
    mixroute models create NAME --groups K      # also: models list, models delete NAME
    mixroute feed FILE.jsonl --model NAME
    mixroute route --model NAME DOCS.jsonl      # through the API
    mixroute snapshot create|list --model NAME
    mixroute rollback SNAPSHOT --model NAME [--replay] [--skip FIRST..LAST]
    mixroute drift --model NAME [--plot weights.png]
    mixroute demo                               # the invented ferry-inbox demo, < 1 minute

JSON-lines input: one ``{"id": ..., "text": ...}`` a line. Invalid lines are reported on
standard error with their line number and skipped; ``--strict`` rejects the whole file instead
(exit status 2, nothing written or queued). Errors never end in a traceback.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import tempfile
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from service.jsonl import JsonlBatch, read_jsonl

if TYPE_CHECKING:
    import numpy as np

    from mixture.em import FitReport

EXIT_OK = 0
EXIT_FAILURE = 1
EXIT_BAD_INPUT = 2


class CommandError(Exception):
    """A failure to report in one line (no traceback), with an exit status."""

    def __init__(self, message: str, status: int = EXIT_FAILURE) -> None:
        super().__init__(message)
        self.status = status


# -- helpers --------------------------------------------------------------------------------


def _err(message: str) -> None:
    print(f"mixroute: {message}", file=sys.stderr)


def _load_documents(path: str, strict: bool, max_text_bytes: int | None = None) -> JsonlBatch:
    try:
        batch = read_jsonl(path, max_text_bytes=max_text_bytes)
    except OSError as exc:
        raise CommandError(f"cannot read {path}: {exc.strerror or exc}", EXIT_BAD_INPUT) from None
    for problem in batch.problems[:50]:
        _err(f"{path}: {problem}")
    if len(batch.problems) > 50:
        _err(f"{path}: ... and {len(batch.problems) - 50} more invalid lines")
    if batch.problems and strict:
        raise CommandError(
            f"{path}: {len(batch.problems)} invalid line(s); --strict given, nothing done",
            EXIT_BAD_INPUT,
        )
    if batch.problems:
        _err(f"{path}: skipped {len(batch.problems)} invalid line(s)")
    if not batch.documents:
        raise CommandError(f"{path}: no valid documents", EXIT_BAD_INPUT)
    return batch


def _progress_bar(total: int, desc: str, unit: str) -> Any:
    from tqdm import tqdm

    # disable=None: no bar when standard error is not a terminal (logs, CI, pipes)
    return tqdm(
        total=total,
        desc=desc,
        unit=unit,
        file=sys.stderr,
        leave=False,
        dynamic_ncols=True,
        disable=None,
        mininterval=0.2,
    )


def _write_atomic(path: Path, data: bytes) -> None:
    """Write to a temporary file beside ``path`` and rename: never a half-written model."""
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def _read_model_file(path: str) -> Any:
    from mixture.serialize import state_from_bytes

    try:
        data = Path(path).read_bytes()
    except OSError as exc:
        raise CommandError(f"cannot read model {path}: {exc.strerror or exc}") from None
    return state_from_bytes(data)


def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


# -- offline commands -----------------------------------------------------------------------


def cmd_fit(args: argparse.Namespace) -> int:
    from mixture.config import MixtureConfig
    from mixture.em import fit_texts
    from mixture.restarts import iteration_bound, restart_kinds
    from mixture.serialize import state_to_bytes

    batch = _load_documents(args.docs, args.strict)
    config_fields: dict[str, Any] = {}
    if args.config:
        try:
            config_fields = json.loads(args.config)
        except json.JSONDecodeError as exc:
            raise CommandError(f"--config is not valid JSON: {exc.msg}", EXIT_BAD_INPUT) from None
        if not isinstance(config_fields, dict):
            raise CommandError("--config must be a JSON object", EXIT_BAD_INPUT)
    config_fields["n_groups"] = args.groups
    for name in ("n_restarts", "max_iter"):
        value = getattr(args, name)
        if value is not None:
            config_fields[name] = value
    config = MixtureConfig.from_dict(config_fields)
    bar = _progress_bar(iteration_bound(config, restart_kinds(config)), "batch EM", "iter")

    def progress(done: int, total: int) -> None:
        bar.total = total
        bar.update(done - bar.n)

    try:
        if args.dask:
            state, report = _fit_on_dask(batch.texts, config, args, progress)
        else:
            state, report = fit_texts(batch.texts, config, seed=args.seed, progress=progress)
    finally:
        bar.close()
    out = Path(args.out)
    _write_atomic(out, state_to_bytes(state))
    convergence = "converged" if report.converged else "stopped at max_iter"
    print(
        f"fitted {len(batch.documents)} documents into {config.n_groups} groups "
        f"(vocabulary {state.vocabulary.n_active} words; {report.n_iter} iterations, "
        f"{convergence}); wrote {out}",
        file=sys.stderr,
    )
    for line in fit_summary_lines(report, state.weights()):
        print(line, file=sys.stderr)
    return EXIT_OK


def _fit_on_dask(
    texts: list[str], config: Any, args: argparse.Namespace, progress: Any
) -> tuple[Any, FitReport]:
    """The fit with its E-steps on the Dask cluster ``--dask`` names (archive.dask_fit)."""
    try:
        from archive.dask_fit import check_dask_address, dask_session, fit_texts_on_dask
    except ImportError as exc:
        raise CommandError(
            f"--dask needs the optional extra: pip install 'mixroute[dask]' ({exc})",
            EXIT_BAD_INPUT,
        ) from None
    try:
        check_dask_address(args.dask)
    except ValueError as exc:
        raise CommandError(str(exc), EXIT_BAD_INPUT) from None
    with dask_session(args.dask) as client:
        return fit_texts_on_dask(
            texts, config, client, seed=args.seed, partitions=args.partitions, progress=progress
        )


# Up to this many groups the weights are printed one by one; past it, a summary.
_WEIGHTS_LISTED = 12


def fit_summary_lines(report: FitReport, weights: np.ndarray) -> list[str]:
    """The fit's summary: every restart's objective, the one kept and why, the weights.

    Parameters
    ----------
    report : mixture.em.FitReport
    weights : ndarray of shape (K,)
        Mixture weights of the fitted state.

    Returns
    -------
    list of str
        One line each; the weights compact (min, quartiles, max, groups under 1 / (10 K))
        past a dozen groups.
    """
    import numpy as np

    from mixture.restarts import STARVED_SHARE

    k = weights.size
    lines = [
        f"{'restart':>7} {'seeding':>7} {'start':<8} {'MAP objective':>16} {'re-seeds':>8} "
        f"{'starved':>7}"
    ]
    for index, run in enumerate(report.restarts):
        mark = "  <- kept" if index == report.best_restart else ""
        lines.append(
            f"{index:>7} {run.seeding:>7} {run.kind:<8} {run.objective:>16.1f} "
            f"{run.reseeds:>8} {run.starved:>7}{mark}"
        )
    winner = report.winner
    if winner is not None:
        alive = min(run.starved for run in report.restarts) == 0
        reason = (
            "highest MAP objective (every run kept all groups alive)"
            if all(run.starved == 0 for run in report.restarts)
            else "highest MAP objective among the runs with every group alive"
            if alive
            else "fewest starved groups, then highest MAP objective"
        )
        lines.append(
            f"kept restart {report.best_restart} ({winner.kind}, seeding {winner.seeding}): "
            f"{reason}"
        )
    floor = STARVED_SHARE / k
    under = int(np.count_nonzero(weights < floor))
    if k <= _WEIGHTS_LISTED:
        listed = ", ".join(f"{w:.3f}" for w in weights)
        lines.append(f"weights [{listed}]; {under} under 1/(10K) = {floor:.2g}")
    else:
        q1, q2, q3 = np.quantile(weights, [0.25, 0.5, 0.75])
        lines.append(
            f"weights min {weights.min():.2g}, quartiles {q1:.2g} / {q2:.2g} / {q3:.2g}, "
            f"max {weights.max():.2g}; {under} of {k} under 1/(10K) = {floor:.2g}"
        )
    return lines


def route_records(
    state: Any,
    batch: JsonlBatch,
    *,
    threshold: float,
    top: int | None,
    chunk: int = 2000,
    progress: Callable[[int], None] | None = None,
) -> list[dict[str, Any]]:
    """Route documents offline; one JSON-able record per document.

    Parameters
    ----------
    state : MixtureState
    batch : JsonlBatch
    threshold : float
        MAP posterior below which the ``low_posterior`` flag is set.
    top : int or None
        Keep only the ``top`` most probable groups of each posterior (None: all groups).
    chunk : int
        Documents routed per call of ``route_texts``.
    progress : callable, optional
        Called with the number of documents done after each chunk.

    Returns
    -------
    list of dict
        ``id``, ``group``, ``posterior`` (list over groups, or ``{group: p}`` for the top n),
        ``margin``, ``log_likelihood_per_token``, ``known_tokens``, ``unknown_tokens``, ``flags``.
    """
    import numpy as np

    from mixture.routing import route_texts

    records: list[dict[str, Any]] = []
    docs = batch.documents
    for start in range(0, len(docs), chunk):
        part = docs[start : start + chunk]
        routing = route_texts(state, [doc.text for doc in part])
        for i, doc in enumerate(part):
            posterior = routing.posterior[i]
            flags: list[str] = []
            if routing.no_evidence[i]:
                flags.append("no_evidence")
            if posterior[routing.group[i]] < threshold:
                flags.append("low_posterior")
            if top is None:
                shown: Any = [float(p) for p in posterior]
            else:
                order = np.argsort(-posterior, kind="stable")[:top]
                shown = {str(int(k)): float(posterior[k]) for k in order}
            records.append(
                {
                    "id": doc.id,
                    "group": int(routing.group[i]),
                    "posterior": shown,
                    "margin": float(routing.margin[i]),
                    "log_likelihood_per_token": _finite(routing.log_likelihood_per_token[i]),
                    "known_tokens": int(routing.known_tokens[i]),
                    "unknown_tokens": int(routing.unknown_tokens[i]),
                    "flags": flags,
                }
            )
        if progress is not None:
            progress(len(part))
    return records


def _write_lines(records: Sequence[dict[str, Any]], out: str | None) -> None:
    lines = "".join(json.dumps(record, ensure_ascii=False) + "\n" for record in records)
    if out in (None, "-"):
        sys.stdout.write(lines)
        sys.stdout.flush()
    else:
        _write_atomic(Path(out), lines.encode("utf-8"))


def cmd_route(args: argparse.Namespace) -> int:
    if args.docs is None:
        # `mixroute route DOCS.jsonl --model NAME` : one positional, the documents.
        args.docs, args.model_file = args.model_file, None
    if args.model_file is not None and args.api is None and args.model is None:
        return _route_offline(args)
    if args.model_file is not None:
        raise CommandError(
            "give either a model file (offline) or --model NAME (through the API), not both",
            EXIT_BAD_INPUT,
        )
    return _route_online(args)


def _route_offline(args: argparse.Namespace) -> int:
    state = _read_model_file(args.model_file)
    batch = _load_documents(args.docs, args.strict)
    bar = _progress_bar(len(batch.documents), "routing", "doc")
    try:
        records = route_records(
            state, batch, threshold=args.threshold, top=args.top, progress=bar.update
        )
    finally:
        bar.close()
    _write_lines(records, args.out)
    return EXIT_OK


def describe_lines(state: Any, top_n: int = 10) -> list[str]:
    """A plain-text description of every group of a model state."""
    from mixture.describe import describe_groups

    lines = [
        f"{state.n_groups} groups, {state.documents_learned} documents learned, "
        f"vocabulary {state.vocabulary.n_active} active words"
    ]
    for summary in describe_groups(state, top_n=top_n):
        data = _summary_dict(summary)
        lines.append(f"group {data['group']}  weight {data['weight']:.3f}")
        lines.append("  top:         " + ", ".join(term for term, _ in data["top_terms"]))
        lines.append("  distinctive: " + ", ".join(term for term, _ in data["distinctive_terms"]))
    return lines


def _summary_dict(summary: Any) -> dict[str, Any]:
    """GroupSummary as a plain dict with ``(term, score)`` pairs."""
    return {
        "group": int(summary.group),
        "weight": float(summary.weight),
        "top_terms": [(str(t), float(s)) for t, s in summary.top_terms],
        "distinctive_terms": [(str(t), float(s)) for t, s in summary.distinctive_terms],
    }


def cmd_describe(args: argparse.Namespace) -> int:
    if args.model is not None or args.model_file is None:
        client = ApiClient(args.api or default_api_url())
        name = args.model or args.model_file
        groups = client.get(f"/models/{name}/groups", params={"top": args.top})
        if args.json:
            print(json.dumps(groups, indent=2))
            return EXIT_OK
        for group in groups["groups"]:
            label = f"  [{group['label']}]" if group.get("label") else ""
            print(f"group {group['group']}  weight {group['weight']:.3f}{label}")
            print("  top:         " + ", ".join(t["term"] for t in group["top_terms"]))
            print("  distinctive: " + ", ".join(t["term"] for t in group["distinctive_terms"]))
        return EXIT_OK
    state = _read_model_file(args.model_file)
    if args.json:
        from mixture.describe import describe_groups

        print(
            json.dumps([_summary_dict(s) for s in describe_groups(state, top_n=args.top)], indent=2)
        )
    else:
        print("\n".join(describe_lines(state, args.top)))
    return EXIT_OK


# -- talking to the API ---------------------------------------------------------------------


def default_api_url() -> str:
    from service.settings import load_settings

    settings = load_settings()
    return os.environ.get("MIXROUTE_API", f"http://{settings.host}:{settings.port}")


class ApiClient:
    """A thin JSON client of the mixroute API that turns failures into one-line errors."""

    def __init__(self, base_url: str, timeout: float = 60.0) -> None:
        import httpx

        from service.settings import load_settings

        self.base_url = base_url.rstrip("/")
        key = load_settings().api_key.get_secret_value()
        headers = {"Authorization": f"Bearer {key}"} if key else {}
        self._client = httpx.Client(base_url=self.base_url, timeout=timeout, headers=headers)

    def request(self, method: str, path: str, **kwargs: Any) -> Any:
        import httpx

        try:
            response = self._client.request(method, path, **kwargs)
        except httpx.TransportError as exc:
            raise CommandError(
                f"cannot reach the mixroute API at {self.base_url} ({exc.__class__.__name__}); "
                "start it with `mixroute serve` or pass --api URL"
            ) from None
        if response.status_code in (401, 403):
            raise CommandError(
                f"{method} {path}: {response.status_code}: the API wants a key with the right "
                "role; set MIXROUTE_API_KEY"
            )
        if response.status_code >= 400:
            try:
                detail = response.json().get("detail", response.text)
            except ValueError:
                detail = response.text
            if not isinstance(detail, str):
                detail = json.dumps(detail)
            raise CommandError(f"{method} {path}: {response.status_code} {detail}")
        if response.status_code == 204 or not response.content:
            return None
        return response.json()

    def get(self, path: str, **kwargs: Any) -> Any:
        return self.request("GET", path, **kwargs)

    def post(self, path: str, **kwargs: Any) -> Any:
        return self.request("POST", path, **kwargs)

    def delete(self, path: str, **kwargs: Any) -> Any:
        return self.request("DELETE", path, **kwargs)

    def close(self) -> None:
        self._client.close()


def _model_name(args: argparse.Namespace) -> str:
    if args.model:
        return str(args.model)
    from service.settings import load_settings

    return load_settings().default_model


def cmd_models(args: argparse.Namespace) -> int:
    client = ApiClient(args.api or default_api_url())
    if args.action == "list":
        for model in client.get("/models")["models"]:
            print(
                f"{model['name']}\tversion {model['version']}\t"
                f"{model['documents_learned']} documents learned\t{model['n_groups']} groups"
            )
    elif args.action == "create":
        try:
            config: dict[str, Any] = json.loads(args.config) if args.config else {}
            if args.options:
                json.loads(args.options)
        except json.JSONDecodeError as exc:
            raise CommandError(f"--config/--options is not valid JSON: {exc.msg}", 2) from None
        config["n_groups"] = args.groups
        body: dict[str, Any] = {"name": args.name, "config": config}
        if args.options:
            body["options"] = json.loads(args.options)
        created = client.post("/models", json=body)
        print(f"created model {created['name']} with {created['n_groups']} groups")
    elif args.action == "delete":
        client.delete(f"/models/{args.name}")
        print(f"deleted model {args.name}")
    return EXIT_OK


def cmd_feed(args: argparse.Namespace) -> int:
    batch = _load_documents(args.file, args.strict)
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    bar = _progress_bar(len(batch.documents), f"queueing to {name}", "doc")
    queued = duplicates = 0
    try:
        for start in range(0, len(batch.documents), args.batch):
            part = batch.documents[start : start + args.batch]
            answer = client.post(
                f"/models/{name}/documents",
                json={"documents": [{"id": d.id, "text": d.text} for d in part]},
            )
            queued += answer["queued"]
            duplicates += answer["duplicates"]
            bar.update(len(part))
    finally:
        bar.close()
    print(f"queued {queued} documents to {name} ({duplicates} already seen, not queued again)")
    return EXIT_OK


def _route_online(args: argparse.Namespace) -> int:
    batch = _load_documents(args.docs, args.strict)
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    records: list[dict[str, Any]] = []
    bar = _progress_bar(len(batch.documents), f"routing with {name}", "doc")
    try:
        for start in range(0, len(batch.documents), 1000):
            part = batch.documents[start : start + 1000]
            body: dict[str, Any] = {
                "documents": [{"id": d.id, "text": d.text} for d in part],
                "learn": bool(args.learn),
            }
            if args.top is not None:
                body["top"] = args.top
            answer = client.post(f"/models/{name}/route", json=body)
            for result in answer["results"]:
                result["version"] = answer["version"]
                records.append(result)
            bar.update(len(part))
    finally:
        bar.close()
    _write_lines(records, args.out)
    return EXIT_OK


def cmd_snapshot(args: argparse.Namespace) -> int:
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    if args.action == "create":
        snap = client.post(f"/models/{name}/snapshots", json={"reason": args.reason})
        print(f"snapshot {snap['id']} of version {snap['version']} ({snap['reason']})")
    else:
        snaps = client.get(f"/models/{name}/snapshots")["snapshots"]
        print(f"{'id':<14}{'version':>8}{'documents':>11}  {'kind':<10}reason")
        for snap in snaps:
            kind = "automatic" if snap["automatic"] else "requested"
            print(
                f"{snap['id']:<14}{snap['version']:>8}{snap['documents_learned']:>11}  "
                f"{kind:<10}{snap['reason']}"
            )
    return EXIT_OK


def _parse_skip(values: Sequence[str]) -> list[list[str]]:
    ranges = []
    for value in values:
        first, sep, last = value.partition("..")
        if not sep or not first or not last:
            raise CommandError(f"--skip wants FIRST..LAST stream ids, got {value!r}", 2)
        ranges.append([first, last])
    return ranges


def cmd_rollback(args: argparse.Namespace) -> int:
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    body = {"replay": bool(args.replay), "skip_ids": _parse_skip(args.skip or [])}
    result = client.post(f"/models/{name}/snapshots/{args.snapshot}/restore", json=body)
    print(
        f"restored snapshot {result['snapshot_id']}: now version {result['version']} "
        f"(parent {result['parent']}, replaced {result['replaced_version']}, safety snapshot "
        f"{result['safety_snapshot_id']}); replay {'on' if result['replay'] else 'off'}"
    )
    return EXIT_OK


def cmd_drift(args: argparse.Namespace) -> int:
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    history = client.get(f"/models/{name}/drift/history", params={"limit": args.limit})["rows"]
    report = client.get(f"/models/{name}/drift")
    alerts = client.get(f"/models/{name}/drift/alerts")["alerts"]
    print(format_drift_table(history))
    state = "ALERT" if report["alert"] else "ok"
    print(
        f"divergence now vs {report['reference']}: {report['js_divergence']:.4f} "
        f"(threshold {report['threshold']:.4f}) {state}"
    )
    for alert in alerts[-10:]:
        print(f"alert at version {alert['version']}: {alert['reason']}")
    if args.plot:
        plot_weights(history, args.plot, title=f"mixture weights of {name}")
        print(f"wrote {args.plot}")
    return EXIT_OK


def format_drift_table(rows: Sequence[dict[str, Any]], max_rows: int = 30) -> str:
    """A text table of drift-history rows (version, documents, weights)."""
    if not rows:
        return "(no checkpoints yet)"
    k = len(rows[0]["weights"])
    header = f"{'version':>7} {'documents':>9} " + " ".join(f"{'g' + str(i):>6}" for i in range(k))
    lines = [header]
    step = max(1, math.ceil(len(rows) / max_rows))
    shown = list(rows[::step])
    if shown[-1] is not rows[-1]:
        shown.append(rows[-1])
    for row in shown:
        weights = " ".join(f"{w:6.3f}" for w in row["weights"])
        lines.append(f"{row['version']:>7} {row['documents_learned']:>9} {weights}")
    return "\n".join(lines)


def plot_weights(rows: Sequence[dict[str, Any]], path: str, title: str) -> None:
    """Plot mixture weights against documents learned into a PNG file."""
    try:
        import matplotlib

        matplotlib.use("Agg")
        import matplotlib.pyplot as plt
    except ImportError:
        raise CommandError("--plot needs matplotlib: pip install 'mixroute[plot]'") from None
    if not rows:
        raise CommandError("no drift history to plot yet")
    x = [row["documents_learned"] for row in rows]
    k = len(rows[0]["weights"])
    fig, ax = plt.subplots(figsize=(8, 4.5))
    for group in range(k):
        ax.plot(x, [row["weights"][group] for row in rows], label=f"group {group}")
    ax.set_xlabel("documents learned")
    ax.set_ylabel("mixture weight")
    ax.set_title(title)
    ax.legend(loc="upper left", fontsize="small", ncol=2)
    fig.tight_layout()
    fig.savefig(path, dpi=100)
    plt.close(fig)


# -- processes ------------------------------------------------------------------------------


def cmd_serve(args: argparse.Namespace) -> int:
    from service.runner import serve

    return serve(
        host=args.host,
        port=args.port,
        data_dir=args.data_dir,
        worker=not args.no_worker,
    )


def cmd_work(args: argparse.Namespace) -> int:
    from service.runner import work

    return work(model=args.model, data_dir=args.data_dir)


def cmd_demo(args: argparse.Namespace) -> int:
    from service.demo import run_demo

    return run_demo(scale=args.scale, seed=args.seed, plot=args.plot, out=sys.stdout)


# -- parser ---------------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every subcommand."""
    parser = argparse.ArgumentParser(
        prog="mixroute",
        description="Route unlabelled messages with an online mixture of unigram language models.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def api_options(p: argparse.ArgumentParser, model: bool = True) -> None:
        p.add_argument("--api", help="base URL of the API (default from MIXROUTE_HOST/PORT)")
        if model:
            p.add_argument("--model", help="model name (default MIXROUTE_DEFAULT_MODEL)")

    p = sub.add_parser("fit", help="fit a model file with batch EM (offline)")
    p.add_argument("docs", help="JSON-lines documents ({'id', 'text'} a line; - for stdin)")
    p.add_argument("--groups", "-k", type=int, required=True, help="number of groups K")
    p.add_argument("--out", "-o", required=True, help="model file to write")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--n-restarts", dest="n_restarts", type=int, default=None)
    p.add_argument("--max-iter", dest="max_iter", type=int, default=None)
    p.add_argument("--config", help="further MixtureConfig fields as a JSON object")
    p.add_argument("--strict", action="store_true", help="reject the file on any invalid line")
    p.add_argument(
        "--dask",
        metavar="ADDRESS",
        help="run the E-steps on a Dask cluster: a scheduler address (tcp://host:8786), "
        "local:N for a LocalCluster of N worker processes, local:N:threads for N threads",
    )
    p.add_argument(
        "--partitions",
        type=int,
        default=None,
        help="row partitions of the archive with --dask (default: two per worker thread)",
    )
    p.set_defaults(func=cmd_fit)

    p = sub.add_parser("route", help="route documents with a model file or through the API")
    p.add_argument("model_file", metavar="MODEL", help="model file (offline) or the documents")
    p.add_argument("docs", nargs="?", help="JSON-lines documents")
    p.add_argument("--out", "-o", help="write JSON lines here instead of standard output")
    p.add_argument("--top", type=int, default=None, help="keep only the top n posteriors")
    p.add_argument("--threshold", type=float, default=0.6, help="offline: low_posterior flag")
    p.add_argument("--learn", action="store_true", help="API: also queue them for learning")
    p.add_argument("--strict", action="store_true", help="reject the file on any invalid line")
    api_options(p)
    p.set_defaults(func=cmd_route)

    p = sub.add_parser("describe", help="top and distinctive terms of every group")
    p.add_argument("model_file", metavar="MODEL", nargs="?", help="model file (offline)")
    p.add_argument("--top", type=int, default=10)
    p.add_argument("--json", action="store_true")
    api_options(p)
    p.set_defaults(func=cmd_describe)

    p = sub.add_parser("serve", help="run the API (and a worker) on Redis or embedded Redis")
    p.add_argument("--host")
    p.add_argument("--port", type=int)
    p.add_argument("--data-dir", dest="data_dir", help="embedded Redis folder")
    p.add_argument("--no-worker", dest="no_worker", action="store_true")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("work", help="run one learning worker (needs REDIS_URL)")
    p.add_argument("--model", help="model to learn (default: every model, one thread each)")
    p.add_argument("--data-dir", dest="data_dir", help="embedded Redis folder")
    p.set_defaults(func=cmd_work)

    p = sub.add_parser("models", help="create, list or delete models on the API")
    msub = p.add_subparsers(dest="action", required=True)
    mp = msub.add_parser("list")
    api_options(mp, model=False)
    mp = msub.add_parser("create")
    mp.add_argument("name")
    mp.add_argument("--groups", "-k", type=int, required=True)
    mp.add_argument("--config", help="further MixtureConfig fields as a JSON object")
    mp.add_argument("--options", help="model options (checkpointing, retention...) as JSON")
    api_options(mp, model=False)
    mp = msub.add_parser("delete")
    mp.add_argument("name")
    api_options(mp, model=False)
    p.set_defaults(func=cmd_models)

    p = sub.add_parser("feed", help="queue a JSON-lines file for learning")
    p.add_argument("file")
    p.add_argument("--batch", type=int, default=500, help="documents per request")
    p.add_argument("--strict", action="store_true")
    api_options(p)
    p.set_defaults(func=cmd_feed)

    p = sub.add_parser("snapshot", help="create or list snapshots")
    p.add_argument("action", choices=("create", "list"))
    p.add_argument("--reason", default="requested from the command line")
    api_options(p)
    p.set_defaults(func=cmd_snapshot)

    p = sub.add_parser("rollback", help="restore a snapshot, optionally replaying the stream")
    p.add_argument("snapshot")
    p.add_argument("--replay", action="store_true", help="relearn the stream after it")
    p.add_argument("--skip", action="append", metavar="FIRST..LAST", help="stream ids to skip")
    api_options(p)
    p.set_defaults(func=cmd_rollback)

    p = sub.add_parser("drift", help="weights over time, divergence and alerts")
    p.add_argument("--limit", type=int, default=1000)
    p.add_argument("--plot", metavar="PNG", help="also plot the weights into this file")
    api_options(p)
    p.set_defaults(func=cmd_drift)

    p = sub.add_parser("demo", help="the invented ferry-inbox demo (embedded Redis, < 1 min)")
    p.add_argument("--scale", type=float, default=1.0, help="multiply the messages per day")
    p.add_argument("--seed", type=int, default=0)
    p.add_argument("--plot", metavar="PNG", help="also plot the weights into this file")
    p.set_defaults(func=cmd_demo)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``mixroute`` console script; returns the exit status."""
    from mixture.errors import MixrouteError

    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except CommandError as exc:
        _err(str(exc))
        return exc.status
    except MixrouteError as exc:
        _err(str(exc))
        return EXIT_BAD_INPUT
    except KeyboardInterrupt:
        _err("interrupted")
        return 130
    except BrokenPipeError:  # output piped into `head` and friends: stop quietly
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
        return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
