"""The offline command line: fit, route and describe over JSON-lines files, with bad lines
reported by number and skipped (or, with --strict, the whole file refused, nothing written)."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from mixture.routing import route_texts
from mixture.serialize import state_from_bytes
from service.cli import main
from service.demo_data import default_days, generate_day

BAD_LINES = [
    b"this is not json",
    b'{"id": "no-text"}',
    b"[1, 2, 3]",
    b'{"id": "empty", "text": "   "}',
    b'{"id": "latin1", "text": "caf\xe9 on the ferry"}',
    b'{"id": {"nested": 1}, "text": "a ferry"}',
]


@pytest.fixture(scope="module")
def corpus(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list[dict], list[int]]:
    """Three invented days as JSON lines with bad lines mixed in; returns the path, the valid
    records and the line numbers of the bad ones."""
    folder = tmp_path_factory.mktemp("cli")
    records = [m.to_json() for plan in default_days(0.4)[:3] for m in generate_day(plan, 8)]
    lines: list[bytes] = []
    bad_numbers: list[int] = []
    for i, record in enumerate(records):
        lines.append(json.dumps(record).encode())
        if i % 100 == 10 and len(bad_numbers) < len(BAD_LINES):
            lines.append(BAD_LINES[len(bad_numbers)])
            bad_numbers.append(len(lines))
        if i == 40:
            lines.append(b"")  # blank lines are ignored, not errors
    path = folder / "docs.jsonl"
    path.write_bytes(b"\n".join(lines) + b"\n")
    assert len(bad_numbers) == len(BAD_LINES)
    return path, records, bad_numbers


@pytest.fixture(scope="module")
def model_file(corpus, tmp_path_factory: pytest.TempPathFactory) -> Path:
    path, _, _ = corpus
    out = tmp_path_factory.mktemp("model") / "ferry.model"
    assert main(["fit", str(path), "--groups", "8", "--out", str(out), "--seed", "1"]) == 0
    return out


def test_fit_reports_bad_lines_by_number_and_skips_them(corpus, tmp_path, capsys) -> None:
    path, records, bad_numbers = corpus
    out = tmp_path / "m.model"
    status = main(["fit", str(path), "--groups", "8", "--out", str(out), "--n-restarts", "1"])
    err = capsys.readouterr().err
    assert status == 0
    for number in bad_numbers:
        assert f"line {number}:" in err
    assert "not valid JSON" in err and 'missing field "text"' in err
    assert "not valid UTF-8" in err and 'field "text" is empty' in err
    assert f"skipped {len(bad_numbers)} invalid line(s)" in err
    assert "Traceback" not in err
    state = state_from_bytes(out.read_bytes())
    assert state.documents_learned == len(records)
    assert state.n_groups == 8


def test_strict_rejects_the_file_and_writes_nothing(corpus, model_file, tmp_path, capsys) -> None:
    path, _, bad_numbers = corpus
    out = tmp_path / "never.model"
    assert main(["fit", str(path), "--groups", "8", "--out", str(out), "--strict"]) == 2
    routed = tmp_path / "never.jsonl"
    assert (
        main(
            ["route", str(path), "--model-file", str(model_file), "--out", str(routed), "--strict"]
        )
        == 2
    )
    err = capsys.readouterr().err
    assert "--strict given, nothing done" in err and f"line {bad_numbers[0]}:" in err
    assert not out.exists() and not routed.exists()
    assert list(tmp_path.iterdir()) == []  # no temporary file left behind either


def test_route_writes_one_line_per_valid_document(corpus, model_file, tmp_path) -> None:
    from sklearn.metrics import normalized_mutual_info_score

    path, records, _ = corpus
    out = tmp_path / "routed.jsonl"
    assert main(["route", str(path), "--model-file", str(model_file), "--out", str(out)]) == 0
    rows = [json.loads(line) for line in out.read_text().splitlines()]
    assert [row["id"] for row in rows] == [r["id"] for r in records]
    state = state_from_bytes(model_file.read_bytes())
    reference = route_texts(state, [r["text"] for r in records])
    posterior = np.zeros_like(reference.posterior)
    for i, row in enumerate(rows):
        for entry in row["posterior"]:
            posterior[i, entry["group"]] = entry["probability"]
    np.testing.assert_allclose(posterior, reference.posterior, rtol=0, atol=1e-12)
    assert [row["group"] for row in rows] == reference.group.tolist()
    for row in rows:
        assert set(row) == {
            "id", "group", "posterior", "margin", "log_likelihood_per_token",
            "known_tokens", "unknown_tokens", "review", "review_reasons",
        }  # fmt: skip
        assert row["group"] == row["posterior"][0]["group"]  # most probable first
    # Against the invented ground truth, scored by scikit-learn's NMI
    # (sklearn.metrics.normalized_mutual_info_score). The 0.8 floor is ours (common practice
    # for "the groups are the themes", no source); the themes are generated to be separable.
    nmi = normalized_mutual_info_score(
        [r["theme"] for r in records], [row["group"] for row in rows]
    )
    assert nmi >= 0.8, nmi


def test_route_top_n_and_review_reasons(model_file, tmp_path, capsys) -> None:
    docs = tmp_path / "two.jsonl"
    docs.write_text(
        json.dumps({"id": 1, "text": "zzzz qqqq xxyyzz"})
        + "\n"
        + json.dumps({"id": "b", "text": "my dog and the cafe on the ferry"})
        + "\n"
    )
    argv = [
        "route",
        str(docs),
        "--model-file",
        str(model_file),
        "--top",
        "2",
        "--threshold",
        "0.99",
    ]
    assert main(argv) == 0
    rows = [json.loads(line) for line in capsys.readouterr().out.splitlines()]
    assert rows[0]["id"] == "1" and "no_known_words" in rows[0]["review_reasons"]
    assert rows[0]["review"] is True
    assert rows[0]["known_tokens"] == 0 and rows[0]["log_likelihood_per_token"] is None
    assert all(len(row["posterior"]) == 2 for row in rows)
    top = [entry["probability"] for entry in rows[1]["posterior"]]
    assert top == sorted(top, reverse=True)


def test_describe_lists_every_group(model_file, capsys) -> None:
    assert main(["describe", "--model-file", str(model_file), "--top", "5"]) == 0
    out = capsys.readouterr().out
    assert out.count("\ngroup ") == 8 and "top:" in out and "distinctive:" in out
    assert main(["describe", "--model-file", str(model_file), "--json"]) == 0
    summaries = json.loads(capsys.readouterr().out)
    assert len(summaries) == 8
    assert sum(s["weight"] for s in summaries) == pytest.approx(1.0)


@pytest.mark.parametrize(
    ("argv", "message"),
    [
        (["fit", "{docs}", "--groups", "0", "--out", "{tmp}/m"], "n_groups"),
        (["fit", "{tmp}/missing.jsonl", "--groups", "3", "--out", "{tmp}/m"], "cannot read"),
        (["fit", "{docs}", "--groups", "3", "--out", "{tmp}/m", "--config", "{{"], "--config"),
        (["fit", "{docs}", "--groups", "3", "--out", "{tmp}/m", "--config", '{{"x": 1}}'], "x"),
        (["route", "{docs}", "--model-file", "{tmp}/garbage.model"], "state"),
        (["describe", "--model-file", "{tmp}/missing.model"], "cannot read model"),
    ],
)
def test_errors_are_one_line_and_exit_non_zero(corpus, tmp_path, capsys, argv, message) -> None:
    (tmp_path / "garbage.model").write_bytes(b"not a model at all" * 10)
    path, _, _ = corpus
    filled = [a.format(docs=path, tmp=tmp_path) for a in argv]
    status = main(filled)
    err = capsys.readouterr().err
    assert status != 0
    assert message in err and "Traceback" not in err
    assert not (tmp_path / "m").exists()


def test_drift_table_columns_follow_group_ids() -> None:
    # A birth between two rows: the newborn gets its own column and the earlier row a dash,
    # instead of the second row's weights shifting under the first row's headings.
    from service.cli import format_drift_table

    rows = [
        {"version": 1, "documents_learned": 10, "weights": [0.6, 0.4], "group_ids": [0, 1]},
        {"version": 2, "documents_learned": 20, "weights": [0.5, 0.2, 0.3], "group_ids": [0, 3, 1]},
    ]
    lines = format_drift_table(rows).splitlines()
    assert lines[0].split() == ["version", "documents", "g0", "g1", "g3"]
    assert lines[1].split() == ["1", "10", "0.600", "0.400", "-"]
    assert lines[2].split() == ["2", "20", "0.500", "0.300", "0.200"]
    # Rows written before ids name groups by position.
    assert (
        format_drift_table([{"version": 1, "documents_learned": 5, "weights": [1.0]}]).split()[-1]
        == "1.000"
    )


def test_route_and_describe_name_groups_by_id_after_a_retirement(
    model_file, corpus, tmp_path, capsys
) -> None:
    # a state whose positions and ids differ (group 0 retired): answers name ids, as the API
    from mixture.lifecycle import retire
    from mixture.serialize import state_to_bytes

    state = state_from_bytes(model_file.read_bytes())
    retire(state, 0, reason="test")
    ids = state.group_ids.tolist()
    assert ids == list(range(1, 8))
    changed = tmp_path / "retired.model"
    changed.write_bytes(state_to_bytes(state))
    path, records, _ = corpus
    out = tmp_path / "routed.jsonl"
    assert main(["route", str(path), "--model-file", str(changed), "--out", str(out)]) == 0
    routed = [json.loads(line) for line in out.read_text().splitlines()]
    expected = route_texts(state, [r["text"] for r in records[:50]]).group
    assert [r["group"] for r in routed[:50]] == [ids[p] for p in expected.tolist()]
    assert all(entry["group"] in ids for r in routed[:50] for entry in r["posterior"])
    capsys.readouterr()
    assert main(["describe", "--model-file", str(changed), "--json"]) == 0
    described = json.loads(capsys.readouterr().out)
    assert [g["group"] for g in described] == ids
