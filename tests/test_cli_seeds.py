"""``mixroute fit --seeds``: groups started from example messages, on the invented ferry inbox.

Source: Nigam, McCallum, Thrun and Mitchell (2000): labelled documents keep their class
through EM, so a group started from a theme's examples ends up holding that theme's messages.
The messages and the seeds are INVENTED (service/demo_data.py, service/examples.py); their
themes are the reference the test checks against. The 0.8 floor is common practice for "most
of a theme", no source.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from mixture.routing import route_texts
from mixture.serialize import state_from_bytes
from service.cli import main
from service.demo_data import default_days, generate_day
from service.examples import SEED_THEMES, SEEDS_PATH, seed_lines

THEME_SHARE = 0.8


@pytest.fixture(scope="module")
def inbox(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, list[dict]]:
    records = [m.to_json() for plan in default_days(0.4)[:2] for m in generate_day(plan, 3)]
    path = tmp_path_factory.mktemp("seeds") / "inbox.jsonl"
    path.write_text("".join(json.dumps(r) + "\n" for r in records), encoding="utf-8")
    return path, records


def test_the_example_seeds_file_is_generated():
    # The repository's example is INVENTED and made by our code, not edited by hand.
    assert SEEDS_PATH.read_text(encoding="utf-8") == seed_lines()
    assert all(json.loads(line)["invented"] for line in seed_lines().splitlines())


def test_a_seeded_fit_puts_each_seeds_theme_in_its_group(inbox, tmp_path, capsys):
    path, records = inbox
    out = tmp_path / "seeded.model"
    argv = ["fit", str(path), "-k", "8", "--seeds", str(SEEDS_PATH), "-o", str(out)]
    assert main([*argv, "--n-restarts", "1"]) == 0
    err = capsys.readouterr().err
    state = state_from_bytes(out.read_bytes())
    seeds = [json.loads(line) for line in SEEDS_PATH.read_text(encoding="utf-8").splitlines()]
    # Seeded groups come first and keep their labels (model file and printed summary).
    assert [g["label"] for g in state.metadata["seed_groups"]] == [s["label"] for s in seeds]
    assert [g["group"] for g in state.metadata["seed_groups"]] == [0, 1, 2]
    assert "seeded groups:" in err and "group 0 [Lost property] -> lost-property@" in err
    assert state.labelled.source_counts() == {"example": 12}
    routed = route_texts(state, [r["text"] for r in records]).group
    themes = np.array([r["theme"] for r in records])
    for group, theme in enumerate(SEED_THEMES):
        share = float(np.mean(routed[themes == theme] == group))
        print(f"{theme}: {share:.3f} of its messages in seeded group {group}")
        assert share >= THEME_SHARE


@pytest.mark.parametrize(
    ("line", "message"),
    [
        (b"not json", "line 2: not JSON"),
        (b'{"label": "", "examples": ["a"]}', "line 2: label must be"),
        (b'{"label": "x", "examples": []}', "line 2: examples must be"),
        (b'{"label": "x", "examples": ["a", 3]}', "line 2: examples must be"),
        (b'{"label": "x", "destination": 5, "examples": ["a"]}', "line 2: destination"),
        (b'{"label": "Pets", "examples": ["a"]}', "line 2: label 'Pets' is already"),
        (b"[1]", "line 2: a line must be a JSON object"),
    ],
)
def test_a_bad_seeds_line_refuses_the_file(inbox, tmp_path, capsys, line, message):
    path, _ = inbox
    seeds = tmp_path / "seeds.jsonl"
    seeds.write_bytes(b'{"label": "Pets", "examples": ["my dog"]}\n' + line + b"\n")
    out = tmp_path / "m.model"
    assert main(["fit", str(path), "-k", "4", "--seeds", str(seeds), "-o", str(out)]) == 2
    assert message in capsys.readouterr().err
    assert not out.exists()


def test_more_seeds_than_groups_is_refused(inbox, tmp_path, capsys):
    path, _ = inbox
    out = tmp_path / "m.model"
    assert main(["fit", str(path), "-k", "2", "--seeds", str(SEEDS_PATH), "-o", str(out)]) == 2
    assert "3 seeds for 2 groups; give --groups 3" in capsys.readouterr().err
