"""Models: create with a configuration, list, get, delete."""

from __future__ import annotations

from typing import Any

from fastapi import APIRouter, Response, status

from mixture.config import MixtureConfig
from mixture.online import warm_up_progress
from service.errors import InvalidFieldError, PayloadTooLargeError
from service.routers import COMMON_RESPONSES, Runtime, StrictJsonRoute
from service.runtime import LoadedModel, RedisUnavailableError, ServiceRuntime
from service.schemas import ModelIn, ModelList, ModelOut, Problem
from state.errors import OptionsError
from state.keys import validate_model_name
from state.options import ModelOptions
from state.registry import Seed

router = APIRouter(tags=["models"], responses=COMMON_RESPONSES, route_class=StrictJsonRoute)

NOT_FOUND = {404: {"model": Problem, "description": "Unknown model"}}


def model_out(runtime: ServiceRuntime, loaded: LoadedModel, with_stream: bool) -> dict[str, Any]:
    """The JSON description of one loaded model."""
    state = loaded.state
    k = loaded.n_groups
    stream: dict[str, Any] | None = None
    if with_stream:
        try:
            stream = runtime.call(loaded.store.stream_info)
        except RedisUnavailableError:
            stream = None
    return {
        "name": loaded.name,
        "n_groups": k,
        "group_ids": loaded.group_ids,
        "version": loaded.version,
        "documents_learned": int(state.documents_learned) if state is not None else 0,
        "warmed_up": bool(state is not None and state.warmed_up),
        "provisional": loaded.provisional,
        "status": _status(loaded),
        "weights": [float(w) for w in state.weights()] if state is not None else [1.0 / k] * k,
        "review_threshold": loaded.review_threshold,
        "created": loaded.info.created,
        "config": loaded.info.config.to_dict(),
        "options": loaded.info.options.to_dict(),
        "stream": _jsonable(stream),
        "served_watermark": state.watermark if state is not None else "",
    }


def _status(loaded: LoadedModel) -> str:
    """ "warmed up", or where the warm-up stands (tokens or documents buffered, of how many)."""
    if loaded.state is None:
        config = loaded.info.config
        target = (
            f"0 of {config.warmup_tokens} tokens buffered"
            if config.warmup_tokens
            else f"0 of {max(config.warmup_documents, config.n_groups)} documents buffered"
        )
        return f"warming up: {target} (no checkpoint yet)"
    return warm_up_progress(loaded.state).describe()


def _jsonable(value: Any) -> Any:
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, float) and value != value:
        return None
    return value


# A model whose number of topics is unknown starts with this many groups and grows by births
# (two: the fewest a mixture can split a stream into) up to UNKNOWN_MAX_GROUPS unless told
# otherwise (rule of thumb, no source: room for a busy inbox's topics at a modest cost per
# update, which is O(words x K)).
UNKNOWN_START_GROUPS = 2
UNKNOWN_MAX_GROUPS = 32


def creation_config(
    fields: dict[str, Any], max_groups: int | None, seeds: int = 0
) -> dict[str, Any]:
    """The configuration of a new model from the fields the request set.

    Without ``n_groups`` the model starts small with the lifecycle on (K unknown, as in a new
    inbox): ``UNKNOWN_START_GROUPS`` groups, or one more than ``seeds`` when that is more (a
    group for the messages no seed describes; rule of thumb, no source), ``max_groups`` (or
    ``UNKNOWN_MAX_GROUPS``) as the ceiling. With ``n_groups`` the lifecycle follows
    ``lifecycle.enabled`` (off by default). ``max_groups`` sets ``lifecycle.max_groups`` in
    both cases.
    """
    out = dict(fields)
    lifecycle = dict(out.get("lifecycle") or {})
    if "n_groups" not in out:
        out["n_groups"] = max(UNKNOWN_START_GROUPS, seeds + 1 if seeds else 0)
        lifecycle.setdefault("enabled", True)
        lifecycle.setdefault("max_groups", UNKNOWN_MAX_GROUPS)
    if max_groups is not None:
        lifecycle["max_groups"] = max_groups
    if lifecycle:
        out["lifecycle"] = lifecycle
    return out


@router.post(
    "/models",
    status_code=status.HTTP_201_CREATED,
    response_model=ModelOut,
    summary="Create a model",
    responses={
        409: {"model": Problem, "description": "Name taken"},
        422: {"model": Problem, "description": "Configuration out of range (names the field)"},
    },
)
def create_model(body: ModelIn, runtime: Runtime) -> dict[str, Any]:
    """Register a model; its worker starts learning from its stream.

    ``seeds`` start groups from what the team knows: seed i is group id i, with its label and
    destination set, and its examples are the stream's first entries, learned as labelled
    documents (source ``example``): the warm-up and every refit keep them in their group.
    """
    try:
        validate_model_name(body.name)
    except OptionsError as exc:
        raise InvalidFieldError(str(exc), "name") from None
    # the schemas fixed the types; the dataclasses check the ranges and fill the defaults
    config = MixtureConfig.from_dict(
        creation_config(
            body.config.model_dump(exclude_unset=True), body.max_groups, len(body.seeds)
        )
    )
    options = ModelOptions.from_dict(body.options.model_dump(exclude_unset=True))
    seeds = [Seed(s.label, s.destination, tuple(s.examples)) for s in body.seeds]
    if len(seeds) > config.n_groups:
        raise InvalidFieldError(
            f"{len(seeds)} seeds for {config.n_groups} groups (config.n_groups): each seed is "
            f"one starting group, so give n_groups >= {len(seeds)} or leave it out",
            "seeds",
        )
    settings = runtime.settings
    for i, seed in enumerate(seeds):
        for j, text in enumerate(seed.examples):
            where = f"seeds.{i}.examples.{j}"
            if not text.strip():
                raise InvalidFieldError(f"{where} is empty: give the example's text", where)
            if len(text.encode("utf-8")) > settings.max_text_bytes:
                raise PayloadTooLargeError(
                    f"{where} is over {settings.max_text_bytes} bytes (MIXROUTE_MAX_TEXT_BYTES)",
                    field=where,
                )
    runtime.call(lambda: runtime.registry.create(body.name, config, options, seeds))
    loaded = runtime.reload(body.name)
    return model_out(runtime, loaded, with_stream=False)


@router.get("/models", response_model=ModelList, summary="List models")
def list_models(runtime: Runtime) -> dict[str, Any]:
    """Every registered model (from memory when Redis is unreachable)."""
    try:
        runtime.load_all()
    except RedisUnavailableError:
        if not runtime.models:
            raise
    return {"models": [model_out(runtime, m, False) for _, m in sorted(runtime.models.items())]}


@router.get("/models/{model}", response_model=ModelOut, responses=NOT_FOUND, summary="Get one")
def get_model(model: str, runtime: Runtime) -> dict[str, Any]:
    """Version, documents learned, weights, configuration and stream figures."""
    return model_out(runtime, runtime.model(model), with_stream=True)


@router.delete(
    "/models/{model}",
    status_code=status.HTTP_204_NO_CONTENT,
    responses=NOT_FOUND,
    summary="Delete a model and all its data",
)
def delete_model(model: str, runtime: Runtime) -> Response:
    """Remove every Redis key of the model: stream (message texts), state, snapshots, history."""
    validate_model_name(model)
    runtime.call(lambda: runtime.registry.delete(model))
    runtime.forget(model)
    return Response(status_code=status.HTTP_204_NO_CONTENT)
