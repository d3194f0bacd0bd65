"""The README says what the code does: its curl examples name routes the app really has (and
every main route has one), its table of review reasons is the code's table, its command-line
block names every command, and the example inbox is what the generator writes (invented)."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from mixture.routing import REVIEW_REASONS
from service.app import create_app
from service.auth import app_routes
from service.cli import build_parser, main
from service.examples import EXAMPLE_PATH, example_lines
from service.settings import Settings

README = (Path(__file__).resolve().parent.parent / "README.md").read_text(encoding="utf-8")

# Routes that are not called by hand: the API's own documentation pages and the dashboard's
# files (the page itself, /dashboard, is linked from `serve`'s output instead).
NOT_MAIN = ("/openapi.json", "/docs", "/redoc", "/dashboard")


def _template_pattern(template: str) -> re.Pattern[str]:
    parts = re.split(r"(\{[^}]+\})", template)
    regex = "".join("[^/]+" if p.startswith("{") else re.escape(p) for p in parts)
    return re.compile(f"^{regex}$")


def _app_routes() -> list[tuple[str, frozenset[str]]]:
    app = create_app(Settings(redis_url="redis://127.0.0.1:1/0"))
    return [(path, methods) for path, methods in app_routes(app) if methods]


def _curl_calls() -> list[tuple[str, str]]:
    """(method, path) of every curl line of the README that calls $API."""
    calls = []
    for line in README.splitlines():
        if "curl" not in line or "$API" not in line:
            continue
        method = re.search(r"-X\s+([A-Z]+)", line)
        path = re.search(r"\$API(/[^\s\"'?]*)", line)
        assert path is not None, line
        calls.append((method.group(1) if method else "GET", path.group(1)))
    return calls


def test_every_curl_example_names_a_route_of_the_app() -> None:
    routes = [(_template_pattern(path), methods) for path, methods in _app_routes()]
    calls = _curl_calls()
    assert len(calls) >= 20
    for method, path in calls:
        assert any(p.match(path) and method in methods for p, methods in routes), (method, path)


def test_every_main_route_has_a_curl_example() -> None:
    calls = _curl_calls()
    missing = []
    for template, methods in _app_routes():
        if template.startswith(NOT_MAIN):
            continue
        pattern = _template_pattern(template)
        for method in methods - {"HEAD"}:
            if not any(m == method and pattern.match(p) for m, p in calls):
                missing.append(f"{method} {template}")
    assert missing == []


def test_the_review_reason_table_is_the_codes() -> None:
    rows = re.findall(r"^\| `([a-z_]+)` \|", README, flags=re.M)
    named = [row for row in rows if row in REVIEW_REASONS or "_" in row]
    assert named == list(REVIEW_REASONS)


def test_the_command_line_block_names_every_command() -> None:
    section = README.split("## Command line", 1)[1].split("\n## ", 1)[0]
    parser = build_parser()
    commands = next(a for a in parser._actions if a.dest == "command").choices
    for command in commands:
        assert f"mixroute {command}" in section, command
    assert "mixroute route DOCS.jsonl --model-file" in section


def test_the_example_inbox_is_the_generators_and_invented() -> None:
    assert EXAMPLE_PATH.read_text(encoding="utf-8") == example_lines()
    records = [json.loads(line) for line in EXAMPLE_PATH.read_text().splitlines()]
    assert 20 <= len(records) <= 200 and all(r["invented"] is True for r in records)
    assert "examples/ferry-inbox.jsonl" in README


def test_the_example_inbox_fits_and_routes(tmp_path: Path, capsys) -> None:
    from sklearn.metrics import adjusted_rand_score

    model = tmp_path / "ferry.model"
    assert main(["fit", str(EXAMPLE_PATH), "--groups", "8", "--out", str(model)]) == 0
    assert main(["route", str(EXAMPLE_PATH), "--model-file", str(model)]) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    themes = [json.loads(line)["theme"] for line in EXAMPLE_PATH.read_text().splitlines()]
    # Against the invented ground truth with scikit-learn's adjusted Rand index: 60 messages
    # of 8 themes are few, so the floor is low (0.3: common practice for "clearly better than
    # chance, which scores 0", no source).
    assert adjusted_rand_score(themes, [r["group"] for r in rows]) > 0.3


@pytest.mark.parametrize("title", ["short", "x" * 100])
def test_demo_headers_are_no_wider_than_their_ruler(title: str) -> None:
    import io

    from service.demo import RULER_WIDTH, Demo

    out = io.StringIO()
    demo = Demo.__new__(Demo)  # the printing half only: no API client
    demo.out = out
    demo.rule(title)
    lines = [line for line in out.getvalue().splitlines() if line]
    ruler = lines[-1]
    assert ruler.endswith("===") and len(ruler) == RULER_WIDTH
    assert all(len(line) <= RULER_WIDTH or not line.startswith("==") for line in lines)
    assert "[invented data]" in out.getvalue()
