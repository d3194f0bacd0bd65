"""The ``mixroute`` command line.

Offline commands work on model files and JSON-lines files with the model core alone::

    mixroute fit DOCS.jsonl --groups K --out MODEL
    mixroute route DOCS.jsonl --model-file MODEL    # MODEL is a file written by `fit`
    mixroute describe --model-file MODEL

Service commands talk to a running API: ``--api URL``, else ``MIXROUTE_API_URL``, else the
address file a running ``serve`` wrote in its data folder, else MIXROUTE_HOST/PORT. Without
``--model`` they use the default model (MIXROUTE_DEFAULT_MODEL)::

    mixroute serve                              # API + worker; embedded Redis without REDIS_URL
    mixroute work --model NAME                  # workers alone (REDIS_URL, or serve's Redis)
    mixroute models create NAME --groups K      # also: models list, models delete NAME
    mixroute feed FILE.jsonl [--wait]           # prints the stream ids it queued
    mixroute route DOCS.jsonl [--model NAME]    # through the API
    mixroute describe [--model NAME]
    mixroute label GROUP [--label TEXT] [--destination TEXT] [--refresh] [--replace] [--history]
    mixroute correct --id ID --group G [--text TEXT]   # or --file FILE.jsonl, --withdraw ID
    mixroute examples GROUP TEXT... [--file FILE.jsonl]
    mixroute flagged
    mixroute snapshot create|list|delete [ID]
    mixroute rollback SNAPSHOT [--replay] [--skip FIRST..LAST] [--skip-received FROM..TO]
    mixroute drift [--reference SNAPSHOT] [--plot weights.png]
    mixroute demo                               # the invented ferry-inbox demo, < 1 minute
    mixroute intake --model NAME [--once]       # file an IMAP folder's mail (needs REDIS_URL)
    mixroute intake --smtp --model NAME         # the SMTP door: route and forward
    mixroute export --model NAME [--format csv|jsonl] [--out FILE]   # what the intake routed

Offline and API answers share their names: the posterior is ``[{"group", "probability"}]``,
most probable first, and ``review_reasons`` come from :data:`mixture.routing.REVIEW_REASONS`.

Input (``fit``, ``route``, ``feed``): JSON lines, one ``{"id": ..., "text": ...}`` a line, or
mail (an mbox file, a Maildir, a folder of .eml files, one message) or CSV with a text column;
the format is told from the content (``--format`` forces it; see :mod:`intake.sources`).
Invalid lines (messages) are reported on standard error with their position and skipped;
``--strict`` rejects the whole file instead (exit status 2, nothing written or queued).
Errors never end in a traceback.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import sys
import tempfile
import time
from collections.abc import Callable, Iterator, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from intake.sources import DocumentBatch

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


def _load_documents(
    path: str,
    strict: bool,
    max_text_bytes: int | None = None,
    *,
    format: str | None = None,
    keep_quotes: bool = False,
) -> DocumentBatch:
    from intake.sources import SourceError, read_documents

    try:
        batch = read_documents(
            path, format, strip_quotes=not keep_quotes, max_text_bytes=max_text_bytes
        )
    except OSError as exc:
        raise CommandError(f"cannot read {path}: {exc.strerror or exc}", EXIT_BAD_INPUT) from None
    except SourceError as exc:
        raise CommandError(str(exc), EXIT_BAD_INPUT) from None
    what = "invalid line" if batch.unit == "line" else f"unreadable {batch.unit}"
    for problem in batch.problems[:50]:
        _err(f"{path}: {problem}")
    if len(batch.problems) > 50:
        _err(f"{path}: ... and {len(batch.problems) - 50} more {what}s")
    if batch.problems and strict:
        raise CommandError(
            f"{path}: {len(batch.problems)} {what}(s); --strict given, nothing done",
            EXIT_BAD_INPUT,
        )
    if batch.problems:
        _err(f"{path}: skipped {len(batch.problems)} {what}(s)")
    if batch.attachments_skipped:
        _err(f"{path}: {batch.attachments_skipped} attachment(s) skipped (not read as text)")
    if not batch.documents:
        raise CommandError(f"{path}: no valid documents", EXIT_BAD_INPUT)
    return batch


def _source_options(p: argparse.ArgumentParser) -> None:
    from intake.sources import FORMATS

    p.add_argument(
        "--format", choices=FORMATS, help="input format (default: told from the content)"
    )
    p.add_argument(
        "--keep-quotes",
        dest="keep_quotes",
        action="store_true",
        help="mail: keep quoted replies and signatures (cut by default)",
    )


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


def format_probability(value: float) -> str:
    """A probability for people: three decimals, and never a 1.000 or 0.000 that is not one.

    A posterior of exactly 1.0 in floating point still means "the others are under 1e-16", not
    certainty, so it is shown as ``>0.999`` too; only an exact 0 (an impossible group) is "0".

    >>> format_probability(0.9999996), format_probability(8.4e-39), format_probability(0.25)
    ('>0.999', '<0.001', '0.250')
    """
    if value <= 0.0:
        return "0"
    if value > 0.999:
        return ">0.999"
    if value < 0.001:
        return "<0.001"
    return f"{value:.3f}"


def _finite(value: float) -> float | None:
    return float(value) if math.isfinite(value) else None


# -- offline commands -----------------------------------------------------------------------


def cmd_fit(args: argparse.Namespace) -> int:
    from mixture.config import MixtureConfig
    from mixture.em import fit_texts
    from mixture.restarts import iteration_bound, restart_kinds
    from mixture.serialize import state_to_bytes

    batch = _load_documents(
        args.docs, args.strict, format=args.format, keep_quotes=args.keep_quotes
    )
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
    seeds = read_seeds(args.seeds, config.n_groups) if args.seeds else []
    labelled = seed_items(seeds)
    bar = _progress_bar(iteration_bound(config, restart_kinds(config)), "batch EM", "iter")

    def progress(done: int, total: int) -> None:
        bar.total = total
        bar.update(done - bar.n)

    try:
        if args.dask:
            state, report = _fit_on_dask(batch.texts, config, args, progress, labelled)
        else:
            state, report = fit_texts(
                batch.texts, config, seed=args.seed, progress=progress, labelled=labelled
            )
    finally:
        bar.close()
    if seeds:
        # The model file keeps the seeded groups' labels (groups 0..S-1, in the file's order).
        state.metadata["seed_groups"] = [
            {
                "group": group,
                "label": seed["label"],
                "destination": seed["destination"],
                "examples": len(seed["examples"]),
            }
            for group, seed in enumerate(seeds)
        ]
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
    for line in seeded_group_lines(state):
        print(line, file=sys.stderr)
    return EXIT_OK


SEED_FIELDS = ("label", "destination", "examples")


def read_seeds(path: str, n_groups: int) -> list[dict[str, Any]]:
    """Read a seeds file: one ``{"label", "destination"?, "examples": [text, ...]}`` a line.

    Blank lines are skipped and other fields ignored (as in document files). The whole file is
    refused on any bad line (seeds are few, and a group started from half its examples would
    be a silent mistake): the message names the line and the field.

    Parameters
    ----------
    path : str
    n_groups : int
        ``--groups``: there may be at most this many seeds (seeded groups are 0..S-1).

    Returns
    -------
    list of dict
        ``{"label": str, "destination": str or None, "examples": [str, ...]}`` in file order.
    """
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        raise CommandError(f"cannot read {path}: {exc.strerror or exc}", EXIT_BAD_INPUT) from None
    seeds: list[dict[str, Any]] = []
    first_line: dict[str, int] = {}
    for number, line in enumerate(raw.split(b"\n"), start=1):
        if not line.strip():
            continue

        def bad(message: str, number: int = number) -> CommandError:
            return CommandError(f"{path} line {number}: {message}", EXIT_BAD_INPUT)

        try:
            record = json.loads(line.decode("utf-8"))
        except UnicodeDecodeError:
            raise bad("not UTF-8") from None
        except json.JSONDecodeError as exc:
            raise bad(f"not JSON ({exc.msg})") from None
        if not isinstance(record, dict):
            raise bad('a line must be a JSON object {"label", "destination", "examples"}')
        label = record.get("label")
        if not isinstance(label, str) or not label.strip():
            raise bad("label must be a non-empty string")
        destination = record.get("destination")
        if destination is not None and not isinstance(destination, str):
            raise bad("destination must be a string when given")
        examples = record.get("examples")
        if (
            not isinstance(examples, list)
            or not examples
            or not all(isinstance(text, str) and text.strip() for text in examples)
        ):
            raise bad("examples must be a non-empty list of non-empty texts")
        if label in first_line:
            raise bad(f"label {label!r} is already the seed of line {first_line[label]}")
        first_line[label] = number
        seeds.append({"label": label, "destination": destination, "examples": examples})
    if not seeds:
        raise CommandError(f"{path}: no seeds (one JSON object a line)", EXIT_BAD_INPUT)
    if len(seeds) > n_groups:
        raise CommandError(
            f"{path}: {len(seeds)} seeds for {n_groups} groups; give --groups {len(seeds)} or "
            f"more (seeded groups are 0..{len(seeds) - 1}, the others are found as usual)",
            EXIT_BAD_INPUT,
        )
    return seeds


def seed_items(seeds: Sequence[dict[str, Any]]) -> list[Any]:
    """The seeds' examples as labelled documents of groups 0..S-1 (source "example")."""
    from mixture.labelled import LabelledItem

    return [
        LabelledItem(f"seed-{group}-{index}", text, group, "example")
        for group, seed in enumerate(seeds)
        for index, text in enumerate(seed["examples"])
    ]


def seeded_group_lines(state: Any, terms: int = 6) -> list[str]:
    """One line per seeded group of a fitted state: label, destination, examples, weight and
    top terms (empty without seeds)."""
    from mixture.describe import describe_groups

    seeds = state.metadata.get("seed_groups") or []
    if not seeds:
        return []
    summaries = {s.group: s for s in describe_groups(state, top_n=terms)}
    lines = ["seeded groups:"]
    for seed in seeds:
        summary = summaries[seed["group"]]
        destination = f" -> {seed['destination']}" if seed["destination"] else ""
        top = ", ".join(str(term) for term, _ in summary.top_terms)
        lines.append(
            f"  group {seed['group']} [{seed['label']}]{destination}: {seed['examples']} "
            f"examples, weight {summary.weight:.3f}; top: {top}"
        )
    return lines


def _fit_on_dask(
    texts: list[str],
    config: Any,
    args: argparse.Namespace,
    progress: Any,
    labelled: Sequence[Any] = (),
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
            texts,
            config,
            client,
            seed=args.seed,
            partitions=args.partitions,
            progress=progress,
            labelled=labelled,
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
        f"{'restart':>7} {'seeding':>7} {'run':<8} {'start':<7} {'MAP objective':>16} "
        f"{'re-seeds':>8} {'starved':>7}"
    ]
    for index, run in enumerate(report.restarts):
        mark = "  <- kept" if index == report.best_restart else ""
        lines.append(
            f"{index:>7} {run.seeding:>7} {run.kind:<8} {run.start:<7} {run.objective:>16.1f} "
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
            f"kept restart {report.best_restart} ({winner.kind}, seeding {winner.seeding}, "
            f"start {winner.start}): "
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
    batch: DocumentBatch,
    *,
    threshold: float,
    top: int | None,
    unknown_share: float | None = None,
    chunk: int = 2000,
    progress: Callable[[int], None] | None = None,
) -> list[dict[str, Any]]:
    """Route documents offline; one JSON-able record per document, in the API's shape.

    Parameters
    ----------
    state : MixtureState
    batch : DocumentBatch
    threshold : float
        MAP posterior below which the ``low_posterior`` review reason fires.
    top : int or None
        Keep only the ``top`` most probable groups of each posterior (None: all groups).
    unknown_share : float, optional
        Share of unknown tokens above which ``mostly_unknown_words`` fires (default: the
        service's ``review_unknown_share``).
    chunk : int
        Documents routed per call of ``route_texts``.
    progress : callable, optional
        Called with the number of documents done after each chunk.

    Returns
    -------
    list of dict
        ``id``, ``group``, ``posterior`` (``[{"group", "probability"}]``, most probable
        first), ``margin``, ``log_likelihood_per_token``, ``known_tokens``, ``unknown_tokens``,
        ``review`` and ``review_reasons``: the fields of the API's answer that need no service
        (the typicality rule, ``atypical``, needs the service's recent statistics).
    """
    from mixture.routing import posterior_entries, review_reasons, route_texts

    if unknown_share is None:
        from service.settings import Settings

        unknown_share = float(Settings.model_fields["review_unknown_share"].default)
    records: list[dict[str, Any]] = []
    docs = batch.documents
    ids = [int(g) for g in state.group_ids]  # stable ids, as the API answers
    for start in range(0, len(docs), chunk):
        part = docs[start : start + chunk]
        routing = route_texts(state, [doc.text for doc in part])
        posteriors = posterior_entries(routing.posterior, top, ids)
        reasons = review_reasons(routing, threshold, unknown_share)
        for i, doc in enumerate(part):
            records.append(
                {
                    "id": doc.id,
                    "group": ids[int(routing.group[i])],
                    "posterior": posteriors[i],
                    "margin": float(routing.margin[i]),
                    "log_likelihood_per_token": _finite(routing.log_likelihood_per_token[i]),
                    "known_tokens": int(routing.known_tokens[i]),
                    "unknown_tokens": int(routing.unknown_tokens[i]),
                    "review": bool(reasons[i]),
                    "review_reasons": reasons[i],
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
    # --model-file routes offline with the model core; otherwise the API's model answers.
    if args.model_file is not None:
        if args.model is not None or args.api is not None or args.learn:
            raise CommandError(
                "--model-file routes offline; --model, --api and --learn are for routing "
                "through the API: give one or the other",
                EXIT_BAD_INPUT,
            )
        return _route_offline(args)
    return _route_online(args)


def _route_offline(args: argparse.Namespace) -> int:
    state = _read_model_file(args.model_file)
    batch = _load_documents(
        args.docs, args.strict, format=args.format, keep_quotes=args.keep_quotes
    )
    bar = _progress_bar(len(batch.documents), "routing", "doc")
    try:
        records = route_records(
            state, batch, threshold=_threshold(args), top=args.top, progress=bar.update
        )
    finally:
        bar.close()
    _write_lines(records, args.out)
    return EXIT_OK


def _threshold(args: argparse.Namespace) -> float:
    if args.threshold is not None:
        return float(args.threshold)
    from state.options import ModelOptions

    return float(ModelOptions().review_threshold)  # the service's default


def describe_lines(state: Any, top_n: int = 10, keep_courtesy_terms: bool = False) -> list[str]:
    """A plain-text description of every group of a model state."""
    from mixture.describe import describe_groups

    lines = [
        f"{state.n_groups} groups, {state.documents_learned} documents learned, "
        f"vocabulary {state.vocabulary.n_active} active words"
    ]
    for summary in describe_groups(state, top_n=top_n, keep_courtesy_terms=keep_courtesy_terms):
        data = _summary_dict(summary, state)
        lines.append(f"group {data['group']}  weight {data['weight']:.3f}")
        lines.append("  top:         " + ", ".join(term for term, _ in data["top_terms"]))
        lines.append("  distinctive: " + ", ".join(term for term, _ in data["distinctive_terms"]))
    return lines


def _summary_dict(summary: Any, state: Any) -> dict[str, Any]:
    """GroupSummary as a plain dict with ``(term, score)`` pairs, the group by its stable id
    (``describe_groups`` numbers by position)."""
    return {
        "group": int(state.group_ids[summary.group]),
        "weight": float(summary.weight),
        "top_terms": [(str(t), float(s)) for t, s in summary.top_terms],
        "distinctive_terms": [(str(t), float(s)) for t, s in summary.distinctive_terms],
    }


def cmd_describe(args: argparse.Namespace) -> int:
    if args.model_file is None:
        return _describe_online(args)
    if args.model is not None or args.api is not None:
        raise CommandError(
            "--model-file describes a model file; --model and --api a model of the API: "
            "give one or the other",
            EXIT_BAD_INPUT,
        )
    state = _read_model_file(args.model_file)
    if args.json:
        from mixture.describe import describe_groups

        summaries = describe_groups(
            state, top_n=args.top, keep_courtesy_terms=args.keep_courtesy_terms
        )
        print(json.dumps([_summary_dict(s, state) for s in summaries], indent=2))
    else:
        print("\n".join(describe_lines(state, args.top, args.keep_courtesy_terms)))
    return EXIT_OK


def _describe_online(args: argparse.Namespace) -> int:
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    params: dict[str, Any] = {"top": args.top}
    if args.keep_courtesy_terms:
        params["keep_courtesy_terms"] = "true"
    groups = client.get(f"/models/{name}/groups", params=params)
    if args.json:
        print(json.dumps(groups, indent=2))
        return EXIT_OK
    print(f"model {groups['model']}, version {groups['version']}: {len(groups['groups'])} groups")
    for group in groups["groups"]:
        label = f"  [{group['label']}]" if group.get("label") else ""
        destination = f" -> {group['destination']}" if group.get("destination") else ""
        print(f"group {group['group']}  weight {group['weight']:.3f}{label}{destination}")
        print("  top:         " + ", ".join(t["term"] for t in group["top_terms"]))
        print("  distinctive: " + ", ".join(t["term"] for t in group["distinctive_terms"]))
    return EXIT_OK


# -- talking to the API ---------------------------------------------------------------------


def default_api_url() -> str:
    """The API the client commands talk to when ``--api`` is not given.

    In order: ``MIXROUTE_API_URL``; the address file of a ``serve`` running on the data folder
    (``MIXROUTE_DATA_DIR``; see :mod:`service.address`), so ``serve --port X`` is found; the
    settings' host and port.
    """
    from service.address import api_url_for, read_address
    from service.settings import load_settings

    explicit = os.environ.get("MIXROUTE_API_URL")
    if explicit:
        return explicit
    settings = load_settings()
    address = read_address(settings.data_dir)
    if address is not None:
        return address.api_url
    return api_url_for(settings.host, settings.port)


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
                "start it with `mixroute serve`, or give its address with --api URL or "
                "MIXROUTE_API_URL"
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


def _learned_or_warming(model: dict[str, Any]) -> str:
    """Documents learned, or the warm-up's progress while nothing can be routed yet."""
    if model.get("warmed_up", True):
        return f"{model['documents_learned']:,} documents learned"
    if model.get("status"):  # "warming up: N of M tokens buffered (...)"
        return str(model["status"])
    target = model.get("config", {}).get("warmup_documents")
    of = f" of {target:,}" if isinstance(target, int) else ""
    return f"warming up: {model['documents_learned']:,}{of} buffered"


def cmd_models(args: argparse.Namespace) -> int:
    client = ApiClient(args.api or default_api_url())
    if args.action == "list":
        for model in client.get("/models")["models"]:
            print(
                f"{model['name']}\tversion {model['version']}\t{_learned_or_warming(model)}\t"
                f"{model['n_groups']} groups"
            )
    elif args.action == "create":
        try:
            config: dict[str, Any] = json.loads(args.config) if args.config else {}
            if args.options:
                json.loads(args.options)
        except json.JSONDecodeError as exc:
            raise CommandError(f"--config/--options is not valid JSON: {exc.msg}", 2) from None
        if args.groups is not None:  # left out: the model starts small and grows by births
            config["n_groups"] = args.groups
        body: dict[str, Any] = {"name": args.name, "config": config}
        if args.max_groups is not None:
            body["max_groups"] = args.max_groups
        if args.options:
            body["options"] = json.loads(args.options)
        if args.seeds:  # the file of `fit --seeds`; the API checks the count against n_groups
            limit = args.groups if args.groups is not None else 10_000
            body["seeds"] = read_seeds(args.seeds, limit)
        created = client.post("/models", json=body)
        print(f"created model {created['name']} with {created['n_groups']} groups")
        for group, seed in enumerate(body.get("seeds", [])):
            print(f"  group {group} [{seed['label']}]: {len(seed['examples'])} examples queued")
    elif args.action == "delete":
        client.delete(f"/models/{args.name}")
        print(f"deleted model {args.name}")
    return EXIT_OK


def cmd_feed(args: argparse.Namespace) -> int:
    batch = _load_documents(
        args.file, args.strict, format=args.format, keep_quotes=args.keep_quotes
    )
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    bar = _progress_bar(len(batch.documents), f"queueing to {name}", "doc")
    queued = duplicates = 0
    first_id: str | None = None
    last_id: str | None = None
    try:
        for start in range(0, len(batch.documents), args.batch):
            part = batch.documents[start : start + args.batch]
            answer = client.post(
                f"/models/{name}/documents",
                json={"documents": [{"id": d.id, "text": d.text} for d in part]},
            )
            queued += answer["queued"]
            duplicates += answer["duplicates"]
            ids = [i for i in answer["stream_ids"] if i is not None]
            if ids:
                first_id = first_id or ids[0]
                last_id = ids[-1]
            bar.update(len(part))
    finally:
        bar.close()
    span = f"; stream ids {first_id} .. {last_id}" if first_id is not None else ""
    print(
        f"queued {queued:,} documents to {name}{span} "
        f"({duplicates:,} already seen, not queued again)"
    )
    if args.wait and last_id is not None:
        _wait_learned(client, name, last_id, args.wait_timeout)
    return EXIT_OK


def _stream_position(stream_id: str) -> tuple[int, int]:
    milliseconds, _, sequence = stream_id.partition("-")
    return int(milliseconds), int(sequence or 0)


def _wait_learned(client: ApiClient, name: str, last_id: str, timeout: float) -> None:
    """Poll the model until the API serves a state that has learned through ``last_id``
    (learned, checkpointed and loaded by the API, so the next command's answers include it).

    The stream's watermark moves with the checkpoint; the served watermark once the API has
    loaded it (an API without that field is judged by the stream's watermark alone).
    """
    import time

    deadline = time.monotonic() + timeout
    target = _stream_position(last_id)
    while True:
        model = client.get(f"/models/{name}")
        watermark = (model.get("stream") or {}).get("watermark") or "0-0"
        served = model.get("served_watermark", watermark) or "0-0"
        if min(_stream_position(watermark), _stream_position(served)) >= target:
            print(f"learned through {last_id}: model {name} at version {model['version']}")
            return
        if time.monotonic() >= deadline:
            state = _learned_or_warming(model)
            raise CommandError(
                f"not learned within {timeout:g} s: watermark {watermark} (served {served}), "
                f"{state} (waiting for {last_id})"
            )
        time.sleep(0.5)


def _route_online(args: argparse.Namespace) -> int:
    batch = _load_documents(
        args.docs, args.strict, format=args.format, keep_quotes=args.keep_quotes
    )
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
    if args.action != "list" and args.action != "create" and not args.snapshot_id:
        raise CommandError(f"snapshot {args.action} needs the snapshot's id", EXIT_BAD_INPUT)
    if args.action == "create":
        snap = client.post(f"/models/{name}/snapshots", json={"reason": args.reason})
        print(f"snapshot {snap['id']} of version {snap['version']} ({snap['reason']})")
    elif args.action == "delete":
        client.delete(f"/models/{name}/snapshots/{args.snapshot_id}")
        print(f"deleted snapshot {args.snapshot_id} of {name}")
    else:
        snaps = client.get(f"/models/{name}/snapshots")["snapshots"]
        print(f"{'id':<14}{'version':>8}{'documents':>11}  {'kind':<13}reason")
        for snap in snaps:
            print(
                f"{snap['id']:<14}{snap['version']:>8}{snap['documents_learned']:>11}  "
                f"{snap['kind']:<13}{snap['reason']}"
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


def parse_time(value: str) -> float:
    """Unix seconds, or an ISO 8601 time (UTC when it names no zone), as unix seconds."""
    from datetime import UTC, datetime

    try:
        return float(value)
    except ValueError:
        pass
    try:
        moment = datetime.fromisoformat(value)
    except ValueError:
        raise CommandError(
            f"not a time: {value!r} (unix seconds or ISO 8601, e.g. 2026-05-03T14:00)",
            EXIT_BAD_INPUT,
        ) from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=UTC)
    return moment.timestamp()


def _parse_received(values: Sequence[str]) -> list[list[float]]:
    ranges = []
    for value in values:
        first, sep, last = value.partition("..")
        if not sep or not first or not last:
            raise CommandError(f"--skip-received wants FROM..TO times, got {value!r}", 2)
        ranges.append([parse_time(first), parse_time(last)])
    return ranges


def cmd_rollback(args: argparse.Namespace) -> int:
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    skips = _parse_skip(args.skip or [])
    received = _parse_received(args.skip_received or [])
    if (skips or received) and not args.replay:
        raise CommandError("--skip and --skip-received only apply with --replay", EXIT_BAD_INPUT)
    body = {"replay": bool(args.replay), "skip_ids": skips, "skip_received": received}
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
    params = {"reference": args.reference, "window": args.window}
    report = client.get(
        f"/models/{name}/drift", params={k: v for k, v in params.items() if v is not None}
    )
    alerts = client.get(f"/models/{name}/drift/alerts")["alerts"]
    print(format_drift_table(history))
    state = "ALERT" if report["alert"] else "ok"
    print(
        f"divergence now vs {report['reference']}: {report['js_divergence']:.4f} "
        f"(threshold {report['threshold']:.4f}) {state}"
    )
    for alert in alerts[-10:]:
        print(f"alert at version {alert['version']}: {alert['reason']}")
    if report.get("word_divergence"):
        words = ", ".join(f"g{g} {value:.3f}" for g, value in enumerate(report["word_divergence"]))
        print(f"word divergence per group vs {report['reference']}: {words}")
    if args.plot:
        from service.plot import PlotError, fetch_plot_inputs, write_weights_plot

        try:
            inputs = fetch_plot_inputs(client.get, name, rows=history)
            write_weights_plot(inputs, args.plot, title=f"mixture weights of {name}")
        except PlotError as error:
            raise CommandError(str(error)) from None
        print(f"wrote {args.plot}")
    return EXIT_OK


def format_drift_table(rows: Sequence[dict[str, Any]], max_rows: int = 30) -> str:
    """A text table of drift-history rows (version, documents, a column per group id).

    Columns follow the rows' ``group_ids`` (positions for rows written before ids), so a group
    born or merged away keeps its own column; a dash where the group did not exist.
    """
    if not rows:
        return "(no checkpoints yet)"
    step = max(1, math.ceil(len(rows) / max_rows))
    shown = list(rows[::step])
    if shown[-1] is not rows[-1]:
        shown.append(rows[-1])
    by_id = [_weights_by_id(row) for row in shown]
    ids = sorted({group for weights in by_id for group in weights})
    header = f"{'version':>7} {'documents':>9} " + " ".join(f"{'g' + str(i):>6}" for i in ids)
    lines = [header]
    for row, weights in zip(shown, by_id, strict=True):
        cells = " ".join(f"{weights[i]:6.3f}" if i in weights else f"{'-':>6}" for i in ids)
        lines.append(f"{row['version']:>7} {row['documents_learned']:>9} {cells}")
    return "\n".join(lines)


def _weights_by_id(row: dict[str, Any]) -> dict[int, float]:
    weights = row["weights"]
    ids = row.get("group_ids") or range(len(weights))
    return {int(group): float(weight) for group, weight in zip(ids, weights, strict=True)}


def cmd_label(args: argparse.Namespace) -> int:
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    path = f"/models/{name}/groups/{args.group}/label"
    if args.history:
        return _print_label_history(client.get(f"{path}/history"), args.json)
    for field in ("label", "destination"):
        if getattr(args, field) is not None and getattr(args, f"clear_{field}"):
            raise CommandError(f"give --{field} or --clear-{field}, not both", EXIT_BAD_INPUT)
    if args.replace:
        if args.refresh or args.clear_label or args.clear_destination:
            raise CommandError(
                "--replace sets both fields (a field left out is cleared); it takes no "
                "--refresh or --clear-*",
                EXIT_BAD_INPUT,
            )
        body: dict[str, Any] = {
            k: getattr(args, k) for k in ("label", "destination") if getattr(args, k) is not None
        }
        group = client.request("PUT", path, json=body)
    else:
        body = {k: getattr(args, k) for k in ("label", "destination") if getattr(args, k)}
        body.update({k: None for k in ("label", "destination") if getattr(args, f"clear_{k}")})
        if args.refresh:
            body["refresh"] = True
        if not body:
            raise CommandError(
                "give --label, --destination, --clear-label, --clear-destination or --refresh "
                "(or --history)",
                EXIT_BAD_INPUT,
            )
        group = client.request("PATCH", path, json=body)
    if args.json:
        print(json.dumps(group, indent=2))
        return EXIT_OK
    divergence = group.get("label_divergence")
    words = "-" if divergence is None else f"{divergence:.3f} bit"
    stale = "  STALE" if group.get("label_stale") else ""
    print(
        f"group {group['group']} of {name}: label {group['label'] or '-'}, "
        f"destination {group['destination'] or '-'}; words moved {words}{stale}"
    )
    return EXIT_OK


def _print_label_history(answer: dict[str, Any], as_json: bool) -> int:
    if as_json:
        print(json.dumps(answer, indent=2))
        return EXIT_OK
    rows = answer["history"]
    if not rows:
        print(f"group {answer['group']} of {answer['model']}: no label changes")
    for row in rows:
        when = time.strftime("%Y-%m-%d %H:%M:%S", time.gmtime(row["time"]))
        given = ", ".join(f"{k}={v!r}" for k, v in row["fields"].items()) or "refresh"
        words = "  words recorded" if row["words_recorded"] else ""
        print(
            f"{when}Z  version {row['version']}  {row['action']}: {given} -> label "
            f"{row['label'] or '-'}, destination {row['destination'] or '-'}{words}"
        )
    return EXIT_OK


CORRECTIONS_PER_REQUEST = 500


def _json_objects(path: str, shape: str) -> Iterator[tuple[int, dict[str, Any]]]:
    """Each non-blank line of a JSON-lines file as ``(line number, object)``.

    A line that is not UTF-8, not JSON or not an object is a :class:`CommandError` naming the
    file and line and showing ``shape`` (the object expected), so nothing is sent.
    """
    from intake.jsonl import iter_lines

    try:
        handle = open(path, "rb")  # noqa: SIM115 - closed below
    except OSError as exc:
        raise CommandError(f"cannot read {path}: {exc}", EXIT_BAD_INPUT) from None
    with handle:
        for number, raw in iter_lines(handle):
            where = f"{path}:{number}"
            try:
                item = json.loads(raw.decode("utf-8"))
            except UnicodeDecodeError as exc:
                raise CommandError(
                    f"{where}: not UTF-8 (byte {exc.start})", EXIT_BAD_INPUT
                ) from None
            except ValueError as exc:
                raise CommandError(f"{where}: not JSON ({exc})", EXIT_BAD_INPUT) from None
            if not isinstance(item, dict):
                raise CommandError(f"{where}: expected an object {shape}", EXIT_BAD_INPUT)
            yield number, item


def read_corrections(path: str) -> list[dict[str, Any]]:
    """Corrections from a JSON-lines file: ``{"id", "group", "text"?}`` a line (blank lines
    skipped). A bad line is a :class:`CommandError` naming it: nothing is sent."""
    out: list[dict[str, Any]] = []
    for number, item in _json_objects(path, '{"id": ..., "group": ..., "text": ...}'):
        where = f"{path}:{number}"
        unknown = sorted(set(item) - {"id", "group", "text"})
        if unknown:
            raise CommandError(
                f"{where}: unknown fields {unknown} (give id, group, text)", EXIT_BAD_INPUT
            )
        if not isinstance(item.get("id"), str) or not item["id"]:
            raise CommandError(f"{where}: 'id' must be a non-empty string", EXIT_BAD_INPUT)
        group = item.get("group")
        if isinstance(group, bool) or not isinstance(group, int):
            raise CommandError(f"{where}: 'group' must be an integer", EXIT_BAD_INPUT)
        if "text" in item and not isinstance(item["text"], str):
            raise CommandError(f"{where}: 'text' must be a string", EXIT_BAD_INPUT)
        out.append({k: item[k] for k in ("id", "group", "text") if k in item})
    return out


def format_weight(value: float | None) -> str:
    """An unlabelled weight remaining, as a share of the running average."""
    return "unknown" if value is None else f"{value:.3g}"


def cmd_correct(args: argparse.Namespace) -> int:
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    chosen = [bool(args.id is not None), bool(args.file), bool(args.withdraw), bool(args.list)]
    if sum(chosen) != 1:
        raise CommandError(
            "give one of: --id ID --group G [--text TEXT], --file FILE.jsonl, --withdraw ID, "
            "--list",
            EXIT_BAD_INPUT,
        )
    if args.list:
        answer = client.get(f"/models/{name}/corrections")
        if args.json:
            print(json.dumps(answer, indent=2))
            return EXIT_OK
        for doc in answer["documents"]:
            print(f"{doc['id']}\tgroup {doc['group']}\t{doc['source']}\t{doc['excerpt'][:80]}")
        groups = ", ".join(f"group {g}: {n}" for g, n in sorted(answer["groups"].items()))
        print(
            f"{len(answer['documents'])} labelled documents ({groups or 'none'}); "
            f"{answer['queued']} queued, not learned yet"
        )
        return EXIT_OK
    if args.withdraw:
        answer = client.delete(f"/models/{name}/corrections/{args.withdraw}")
        held = "" if answer["held"] else " (the model does not hold it now: nothing to remove)"
        print(f"withdrawal of {args.withdraw} queued as {answer['stream_id']}{held}")
        return EXIT_OK
    if args.file:
        if args.group is not None or args.text is not None:
            raise CommandError("--group and --text go with --id, not --file", EXIT_BAD_INPUT)
        documents = read_corrections(args.file)
        if not documents:
            raise CommandError(f"{args.file} holds no corrections", EXIT_BAD_INPUT)
    else:
        if args.group is None:
            raise CommandError(
                "--id needs --group (the group the message belongs to)", EXIT_BAD_INPUT
            )
        documents = [{"id": args.id, "group": args.group}]
        if args.text is not None:
            documents[0]["text"] = args.text
    answers: list[dict[str, Any]] = []
    for start in range(0, len(documents), CORRECTIONS_PER_REQUEST):
        chunk = documents[start : start + CORRECTIONS_PER_REQUEST]
        answers += client.post(f"/models/{name}/corrections", json={"documents": chunk})[
            "corrections"
        ]
    if args.json:
        print(json.dumps(answers, indent=2))
        return EXIT_OK
    for answer in answers:
        already = ""
        if answer.get("learned_as_document"):
            already = (
                "; already learned unlabelled, weight remaining "
                f"{format_weight(answer.get('unlabelled_weight_remaining'))}"
            )
        print(
            f"{answer['id']} -> group {answer['group']} queued as {answer['stream_id']} "
            f"(text from {answer['text_from']}){already}"
        )
    return EXIT_OK


def cmd_examples(args: argparse.Namespace) -> int:
    texts = list(args.texts or [])
    if args.file:
        for item in _read_example_lines(args.file):
            texts.append(item)
    if not texts:
        raise CommandError("give example texts, or --file FILE.jsonl", EXIT_BAD_INPUT)
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    answers: list[dict[str, Any]] = []
    for start in range(0, len(texts), CORRECTIONS_PER_REQUEST):
        chunk = texts[start : start + CORRECTIONS_PER_REQUEST]
        answers += client.post(
            f"/models/{name}/groups/{args.group}/examples", json={"examples": chunk}
        )["examples"]
    for answer in answers:
        print(f"{answer['id']} queued as {answer['stream_id']}")
    print(f"{len(answers)} examples of group {args.group} queued")
    return EXIT_OK


def _read_example_lines(path: str) -> list[str]:
    """Example texts from JSON lines (``{"text": ...}`` a line)."""
    out: list[str] = []
    for number, item in _json_objects(path, '{"text": ...}'):
        if not isinstance(item.get("text"), str):
            raise CommandError(
                f'{path}:{number}: expected {{"text": ...}} with a string text', EXIT_BAD_INPUT
            )
        out.append(item["text"])
    return out


def cmd_flagged(args: argparse.Namespace) -> int:
    from mixture.routing import REVIEW_REASONS

    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    answer = client.get(f"/models/{name}/flagged", params={"count": args.count})
    if args.json:
        print(json.dumps(answer, indent=2))
        return EXIT_OK
    documents = answer["documents"]
    if not documents:
        print(f"no flagged messages held for {name} (this API process keeps {answer['kept']})")
        return EXIT_OK
    for doc in documents:
        label = f" '{doc['label']}'" if doc.get("label") else ""
        probability = doc.get("probability")
        shown = "" if probability is None else f"  p {format_probability(probability)}"
        print(
            f"{doc.get('id') or '-'}  group {doc['group']}{label}{shown}  version {doc['version']}"
        )
        for reason in doc["reasons"]:
            print(f"  {reason}: {REVIEW_REASONS.get(reason, reason)}")
        print(f"  {doc['text']}")
    return EXIT_OK


# -- processes ------------------------------------------------------------------------------


def format_events(events: list[dict[str, Any]]) -> str:
    """Group events as a table, newest first (the API's order)."""
    lines = ["version\tkind\tgroups\tdocuments learned\tsnapshot before\treason"]
    for event in events:
        undone = " (undone by a rollback)" if event.get("undone") else ""
        groups = ",".join(str(g) for g in event["groups"])
        lines.append(
            f"{event['version']}\t{event['kind']}{undone}\t{groups}\t{event['position']}\t"
            f"{event.get('snapshot_id') or '-'}\t{event['reason']}"
        )
    return "\n".join(lines)


def cmd_events(args: argparse.Namespace) -> int:
    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    events = client.get(f"/models/{name}/events", params={"limit": args.limit})["events"]
    if not events:
        print(f"model {name} has had no births, merges or retirements")
        return EXIT_OK
    print(format_events(events))
    return EXIT_OK


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

    return work(model=args.model, data_dir=args.data_dir, processes=args.processes)


EXPORT_FIELDS = ("id", "time", "group", "label", "posterior", "review", "filed_to")


def cmd_export(args: argparse.Namespace) -> int:
    """Write the messages the intake routed as CSV or JSON lines (pages of the API)."""
    import csv
    import io

    client = ApiClient(args.api or default_api_url())
    name = _model_name(args)
    rows: list[dict[str, Any]] = []
    after = "-"
    while True:
        page = client.get(f"/models/{name}/routed", params={"after": after, "limit": 5000})
        records = page["records"]
        rows += [{key: record[key] for key in EXPORT_FIELDS} for record in records]
        if len(records) < 5000:
            break
        after = records[-1]["stream_id"]
    if args.format == "jsonl":
        _write_lines(rows, args.out)
    else:
        buffer = io.StringIO()
        writer = csv.DictWriter(buffer, fieldnames=EXPORT_FIELDS, lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
        if args.out in (None, "-"):
            sys.stdout.write(buffer.getvalue())
        else:
            _write_atomic(Path(args.out), buffer.getvalue().encode("utf-8"))
    _err(f"exported {len(rows)} routed message(s) of {name}")
    return EXIT_OK


def cmd_intake(args: argparse.Namespace) -> int:
    from service.intake_command import run_intake, run_smtp_door

    if args.smtp:
        return run_smtp_door(model=args.model)
    return run_intake(model=args.model, once=args.once)


def cmd_demo(args: argparse.Namespace) -> int:
    if args.write_mail:
        from service.demo_data import INVENTED_NOTICE, write_demo_mail

        mbox, maildir = write_demo_mail(args.write_mail, scale=args.scale, seed=args.seed)
        print(f"{INVENTED_NOTICE}\nwrote {mbox} and {maildir}")
        return EXIT_OK
    from service.demo import run_demo

    return run_demo(scale=args.scale, seed=args.seed, plot=args.plot, out=sys.stdout)


# -- parser ---------------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every subcommand; every option says what it does."""
    parser = argparse.ArgumentParser(
        prog="mixroute",
        description="Route unlabelled messages with an online mixture of unigram language models.",
    )
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def api_options(p: argparse.ArgumentParser, model: bool = True) -> None:
        p.add_argument(
            "--api",
            metavar="URL",
            help="base URL of the API (default: MIXROUTE_API_URL, else the address a running "
            "`mixroute serve` wrote in its data folder, else MIXROUTE_HOST/MIXROUTE_PORT)",
        )
        if model:
            p.add_argument(
                "--model", metavar="NAME", help="model name (default: MIXROUTE_DEFAULT_MODEL)"
            )

    def strict_option(p: argparse.ArgumentParser) -> None:
        p.add_argument(
            "--strict", action="store_true", help="refuse the whole file if any line is invalid"
        )

    p = sub.add_parser("fit", help="fit a model file with batch EM (offline)")
    p.add_argument("docs", help="documents: JSON lines ({'id', 'text'} a line), mail or CSV")
    p.add_argument("--groups", "-k", type=int, required=True, help="number of groups K")
    p.add_argument("--out", "-o", required=True, help="model file to write")
    p.add_argument("--seed", type=int, default=0, help="random seed of the restarts (default 0)")
    p.add_argument(
        "--n-restarts",
        dest="n_restarts",
        type=int,
        default=None,
        help="EM restarts; the best is kept (default: MixtureConfig's)",
    )
    p.add_argument(
        "--max-iter",
        dest="max_iter",
        type=int,
        default=None,
        help="EM iterations per restart at most (default: MixtureConfig's)",
    )
    p.add_argument("--config", help="further MixtureConfig fields as a JSON object")
    p.add_argument(
        "--seeds",
        metavar="SEEDS.jsonl",
        help='start groups from example messages: JSON lines {"label", "destination", '
        '"examples": [text, ...]}; seeded groups are 0..S-1 and keep their examples '
        "(semi-supervised EM), the others are found as usual",
    )
    strict_option(p)
    _source_options(p)
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

    p = sub.add_parser(
        "route",
        help="route documents: with a model file (--model-file) or through the API (--model)",
    )
    p.add_argument("docs", help="documents: JSON lines ({'id', 'text'} a line), mail or CSV")
    p.add_argument(
        "--model-file", metavar="PATH", help="route offline with this model file (from `fit`)"
    )
    p.add_argument("--out", "-o", help="write JSON lines here instead of standard output")
    p.add_argument(
        "--top", type=int, default=None, help="keep only the n most probable groups per document"
    )
    p.add_argument(
        "--threshold",
        type=float,
        default=None,
        help="with --model-file: MAP posterior under which low_posterior asks for review "
        "(default: the service's 0.6; through the API the model's own threshold applies)",
    )
    p.add_argument("--learn", action="store_true", help="API: also queue them for learning")
    strict_option(p)
    _source_options(p)
    api_options(p)
    p.set_defaults(func=cmd_route)

    p = sub.add_parser("describe", help="top and distinctive terms of every group")
    p.add_argument(
        "--model-file", metavar="PATH", help="describe this model file (offline) instead"
    )
    p.add_argument("--top", type=int, default=10, help="terms listed per group (default 10)")
    p.add_argument("--json", action="store_true", help="print JSON instead of text")
    p.add_argument(
        "--keep-courtesy-terms",
        action="store_true",
        help="keep greetings and closings (thanks, regards, ...) in the term lists",
    )
    api_options(p)
    p.set_defaults(func=cmd_describe)

    p = sub.add_parser(
        "serve", help="run the API (and a worker) on REDIS_URL or on an embedded Redis"
    )
    p.add_argument("--host", help="address to listen on (default: MIXROUTE_HOST, 127.0.0.1)")
    p.add_argument("--port", type=int, help="port to listen on (default: MIXROUTE_PORT, 8000)")
    p.add_argument(
        "--data-dir",
        dest="data_dir",
        help="folder of the embedded Redis and of the address file the client commands read "
        "(default: MIXROUTE_DATA_DIR)",
    )
    p.add_argument(
        "--no-worker",
        dest="no_worker",
        action="store_true",
        help="serve the API only; run learning with `mixroute work` elsewhere",
    )
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser(
        "work",
        help="run learning workers alone (on REDIS_URL, or on the Redis of a running serve)",
    )
    p.add_argument(
        "--model", help="one model to learn alone (default: share every model with the pool)"
    )
    p.add_argument(
        "--processes",
        type=int,
        default=1,
        help="pool member processes to start on this machine (default 1); every `work` on "
        "the same Redis shares the models, about M/N leases each",
    )
    p.add_argument(
        "--data-dir",
        dest="data_dir",
        help="without REDIS_URL: the data folder of the running `mixroute serve` whose "
        "embedded Redis to use (default: MIXROUTE_DATA_DIR)",
    )
    p.set_defaults(func=cmd_work)

    p = sub.add_parser(
        "intake", help="route and file the mail of an IMAP folder (MIXROUTE_INTAKE_*)"
    )
    p.add_argument("--model", help="model that routes the mail (default MIXROUTE_DEFAULT_MODEL)")
    p.add_argument("--once", action="store_true", help="file what is there now, then exit")
    p.add_argument("--smtp", action="store_true", help="run the SMTP door instead (aiosmtpd)")
    p.set_defaults(func=cmd_intake)

    p = sub.add_parser("export", help="messages the intake routed, as CSV or JSON lines")
    p.add_argument(
        "--format", choices=("csv", "jsonl"), default="csv", help="output format (default csv)"
    )
    p.add_argument("--out", "-o", help="file to write (default: standard output)")
    api_options(p)
    p.set_defaults(func=cmd_export)

    p = sub.add_parser("models", help="create, list or delete models on the API")
    msub = p.add_subparsers(dest="action", required=True, metavar="ACTION")
    mp = msub.add_parser("list", help="every model with its version and documents learned")
    api_options(mp, model=False)
    mp = msub.add_parser("create", help="register a new model")
    mp.add_argument("name", help="model name (letters, digits, '_', '.', '-')")
    mp.add_argument(
        "--groups", "-k", type=int, help="starting groups (left out: 2, growing by births)"
    )
    mp.add_argument("--max-groups", type=int, help="ceiling on the number of groups")
    mp.add_argument("--config", help="further MixtureConfig fields as a JSON object")
    mp.add_argument("--options", help="model options (checkpointing, retention...) as JSON")
    mp.add_argument(
        "--seeds",
        metavar="SEEDS.jsonl",
        help='start groups 0..S-1 from examples: one {"label", "destination"?, "examples": '
        "[text, ...]} a line, as for `fit --seeds`",
    )
    api_options(mp, model=False)
    mp = msub.add_parser("delete", help="delete a model and everything it stored")
    mp.add_argument("name", help="model name")
    api_options(mp, model=False)
    p.set_defaults(func=cmd_models)

    p = sub.add_parser("feed", help="queue a file of documents for learning")
    p.add_argument("file", help="documents: JSON lines ({'id', 'text'} a line), mail or CSV")
    p.add_argument("--batch", type=int, default=500, help="documents per request (default 500)")
    p.add_argument(
        "--wait", action="store_true", help="then wait until the worker has learned them"
    )
    p.add_argument(
        "--wait-timeout",
        dest="wait_timeout",
        type=float,
        default=600.0,
        metavar="SECONDS",
        help="give up waiting after this long (default 600)",
    )
    strict_option(p)
    _source_options(p)
    api_options(p)
    p.set_defaults(func=cmd_feed)

    p = sub.add_parser("snapshot", help="create, list or delete snapshots")
    p.add_argument("action", choices=("create", "list", "delete"), help="what to do")
    p.add_argument("snapshot_id", nargs="?", metavar="ID", help="the snapshot to delete")
    p.add_argument(
        "--reason",
        default="requested from the command line",
        help="create: why the snapshot is taken (shown in the list)",
    )
    api_options(p)
    p.set_defaults(func=cmd_snapshot)

    p = sub.add_parser("rollback", help="restore a snapshot, optionally replaying the stream")
    p.add_argument("snapshot", help="id of the snapshot to restore (see `snapshot list`)")
    p.add_argument("--replay", action="store_true", help="relearn the stream after it")
    p.add_argument(
        "--skip",
        action="append",
        metavar="FIRST..LAST",
        help="with --replay: leave out this inclusive stream-id range (as `feed` prints it); "
        "repeatable",
    )
    p.add_argument(
        "--skip-received",
        dest="skip_received",
        action="append",
        metavar="FROM..TO",
        help="with --replay: leave out messages received in this time range (unix seconds or "
        "ISO 8601, UTC unless a zone is given); repeatable",
    )
    api_options(p)
    p.set_defaults(func=cmd_rollback)

    p = sub.add_parser("drift", help="weights over time, divergence and alerts")
    p.add_argument("--limit", type=int, default=1000, help="newest checkpoints read (default 1000)")
    p.add_argument(
        "--reference",
        metavar="SNAPSHOT",
        help="compare with this snapshot (adds each group's word divergence)",
    )
    p.add_argument(
        "--window",
        type=int,
        metavar="N",
        help="compare with the checkpoint N back (default: the model's drift_window)",
    )
    p.add_argument("--plot", metavar="PNG", help="also plot the weights into this file")
    api_options(p)
    p.set_defaults(func=cmd_drift)

    p = sub.add_parser(
        "label",
        help="name a group and say where its messages go (changes only the fields given)",
    )
    p.add_argument("group", type=int, help="group id (see `describe`)")
    p.add_argument("--label", help="the group's name, e.g. 'lost property'")
    p.add_argument("--destination", help="where its messages go, e.g. an address or queue")
    p.add_argument("--clear-label", action="store_true", help="remove the group's label")
    p.add_argument(
        "--clear-destination", action="store_true", help="remove the group's destination"
    )
    p.add_argument(
        "--refresh",
        action="store_true",
        help="record the group's words now as what the label describes (clears label_stale)",
    )
    p.add_argument(
        "--replace",
        action="store_true",
        help="replace the whole label (HTTP PUT): a field not given is cleared",
    )
    p.add_argument("--history", action="store_true", help="print the group's label changes instead")
    p.add_argument("--json", action="store_true", help="print JSON instead of text")
    api_options(p)
    p.set_defaults(func=cmd_label)

    p = sub.add_parser(
        "correct", help="label a message: the model learns it as a document of that group"
    )
    p.add_argument("--id", help="the message's id (as queued or routed)")
    p.add_argument("--group", type=int, help="with --id: the group id it belongs to")
    p.add_argument(
        "--text",
        help="with --id: the message text (left out: the API looks it up by id in the stream "
        "or among the flagged messages)",
    )
    p.add_argument(
        "--file",
        metavar="FILE.jsonl",
        help='many corrections: JSON lines, {"id", "group", "text"?} a line',
    )
    p.add_argument("--withdraw", metavar="ID", help="withdraw the correction or example of this id")
    p.add_argument(
        "--list", action="store_true", help="list the labelled documents the model holds"
    )
    p.add_argument("--json", action="store_true", help="print JSON instead of text")
    api_options(p)
    p.set_defaults(func=cmd_correct)

    p = sub.add_parser("examples", help="add example messages to a group")
    p.add_argument("group", type=int, help="group id (see `describe`)")
    p.add_argument("texts", nargs="*", metavar="TEXT", help="example message texts")
    p.add_argument(
        "--file", metavar="FILE.jsonl", help='more examples: JSON lines, {"text": ...} a line'
    )
    api_options(p)
    p.set_defaults(func=cmd_examples)

    p = sub.add_parser("flagged", help="recent messages routed with a review reason")
    p.add_argument(
        "--count", type=int, default=20, help="newest flagged messages shown (default 20)"
    )
    p.add_argument("--json", action="store_true", help="print JSON instead of text")
    api_options(p)
    p.set_defaults(func=cmd_flagged)

    p = sub.add_parser("events", help="births, merges and retirements of the groups")
    p.add_argument("--limit", type=int, default=100, help="newest events shown (default 100)")
    api_options(p)
    p.set_defaults(func=cmd_events)

    p = sub.add_parser("demo", help="the invented ferry-inbox demo (embedded Redis, < 1 min)")
    p.add_argument("--scale", type=float, default=1.0, help="multiply the messages per day")
    p.add_argument("--seed", type=int, default=0, help="random seed of the invented inbox")
    p.add_argument("--plot", metavar="PNG", help="also plot the weights into this file")
    p.add_argument(
        "--write-mail",
        dest="write_mail",
        metavar="FOLDER",
        help="only write the invented inbox as FOLDER/inbox.mbox and FOLDER/Maildir",
    )
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
