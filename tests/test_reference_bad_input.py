"""Bad input gets a clear error that names the problem, from each entry point of the model.

The expectations come from the issue (empty corpus, more groups than documents, non-finite or
negative counts, corrupt state bytes, step exponent out of range); the admissible range of the
step exponent, 0.5 < alpha <= 1, is the convergence condition of stepwise EM in Liang and
Klein (2009) (sum of steps infinite, sum of squared steps finite).
"""

from __future__ import annotations

import io
import math
import pickle
import struct
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp

from mixture.config import MixtureConfig
from mixture.em import fit_batch_em, fit_texts
from mixture.errors import ConfigError, InputError, MixrouteError, StateFormatError
from mixture.online import OnlineLearner, stepwise_update
from mixture.routing import route_counts
from mixture.serialize import state_from_bytes, state_to_bytes
from mixture.stats import derive_parameters

TEXTS = [
    "ferry timetable winter crossing delayed by storm",
    "lost luggage left on the upper deck of the ferry",
    "refund request for a cancelled winter crossing",
    "bicycle space booking on the morning ferry",
    "harbour parking permit renewal question",
    "storm warning cancelled the evening crossing again",
]


def _state():
    state, _ = fit_texts(TEXTS, MixtureConfig(n_groups=2, n_restarts=1), seed=0)
    return state


def test_errors_are_value_errors_of_one_family() -> None:
    for cls in (ConfigError, InputError, StateFormatError):
        assert issubclass(cls, MixrouteError) and issubclass(cls, ValueError)


# ---- empty corpus / too many groups ----------------------------------------------------------
def test_empty_corpus() -> None:
    config = MixtureConfig(n_groups=2)
    with pytest.raises(InputError, match=r"(?i)empty|no (buffered )?documents?"):
        fit_batch_em(sp.csr_matrix((0, 5)), config)
    with pytest.raises(InputError, match=r"(?i)empty|no (buffered )?documents?"):
        fit_texts([], config)
    # Documents without a single token are as good as no documents.
    with pytest.raises(InputError, match=r"(?i)token|empty|no .*document"):
        fit_batch_em(sp.csr_matrix((3, 5)), config)


def test_more_groups_than_documents() -> None:
    config = MixtureConfig(n_groups=5)
    counts = sp.csr_matrix(np.array([[1.0, 2.0, 0.0], [0.0, 1.0, 3.0], [2.0, 0.0, 1.0]]))
    with pytest.raises(ConfigError, match="n_groups"):
        fit_batch_em(counts, config)
    with pytest.raises(ConfigError, match="n_groups"):
        fit_texts(TEXTS[:3], config)


# ---- counts ----------------------------------------------------------------------------------
@pytest.mark.parametrize(
    ("bad", "pattern"),
    [
        (math.nan, r"(?i)non-finite|finite|nan"),
        (math.inf, r"(?i)non-finite|finite|inf"),
        (-1.0, r"(?i)negative|>= ?0"),
    ],
)
def test_bad_counts_everywhere(bad: float, pattern: str) -> None:
    dense = np.array([[1.0, 2.0, 0.0], [0.0, 1.0, 3.0], [2.0, 0.0, 1.0]])
    dense[1, 1] = bad
    counts = sp.csr_matrix(dense)
    with pytest.raises(InputError, match=pattern):
        fit_batch_em(counts, MixtureConfig(n_groups=2))
    with pytest.raises(InputError, match=pattern):
        fit_batch_em(dense, MixtureConfig(n_groups=2))  # dense input too
    params = derive_parameters(np.ones((3, 2)), np.ones(2), None, 0.1, 1.0)
    with pytest.raises(InputError, match=pattern):
        route_counts(params, counts)
    state = _state()
    before = state_to_bytes(state)
    wide = sp.csr_matrix((counts.data, counts.indices, counts.indptr), shape=(3, state.capacity))
    with pytest.raises(InputError, match=pattern):
        stepwise_update(state, wide)
    assert state_to_bytes(state) == before, "a rejected batch must leave the state untouched"


# ---- step exponent and other configuration ---------------------------------------------------
@pytest.mark.parametrize("alpha", [0.5, 0.3, 0.0, -1.0, 1.0001, 2.0, math.nan, math.inf])
def test_step_exponent_out_of_range(alpha: float) -> None:
    # Source: Liang and Klein (2009): stepwise EM needs 0.5 < alpha <= 1.
    with pytest.raises(ConfigError, match="step_exponent"):
        MixtureConfig(step_exponent=alpha)
    with pytest.raises(ConfigError, match="step_exponent"):
        MixtureConfig.from_dict({"step_exponent": alpha})


@pytest.mark.parametrize("alpha", [0.5000001, 0.7, 1.0])
def test_step_exponent_in_range_is_accepted(alpha: float) -> None:
    assert MixtureConfig(step_exponent=alpha).step_exponent == alpha


@pytest.mark.parametrize(
    ("field", "value"),
    [
        ("n_groups", 0),
        ("word_pseudocount", -0.1),
        ("weight_pseudocount", math.nan),
        ("batch_size", 0),
        ("max_iter", 0),
    ],
)
def test_config_errors_name_the_field(field: str, value: object) -> None:
    with pytest.raises(ConfigError, match=field):
        MixtureConfig(**{field: value})


def test_unknown_config_field_is_named() -> None:
    with pytest.raises(ConfigError, match="step_exponant"):
        MixtureConfig.from_dict({"step_exponant": 0.7})


# ---- corrupt state bytes ---------------------------------------------------------------------
def test_state_round_trip_is_exact() -> None:
    # Precondition for the corruption tests below: good bytes load back to the same state.
    state = _state()
    data = state_to_bytes(state)
    assert state_to_bytes(state_from_bytes(data)) == data


def test_corrupt_state_bytes() -> None:
    data = state_to_bytes(_state())
    with pytest.raises(StateFormatError, match=r"(?i)truncat|short"):
        state_from_bytes(b"")
    with pytest.raises(StateFormatError, match=r"(?i)magic|not a mixroute"):
        state_from_bytes(b"PK\x03\x04" + bytes(200))  # a zip file, not our format
    with pytest.raises(StateFormatError, match=r"(?i)magic|not a mixroute"):
        state_from_bytes(b'{"groups": 3}' + bytes(64))
    flipped = bytearray(data)
    flipped[len(data) // 2] ^= 0x01
    with pytest.raises(StateFormatError, match=r"(?i)checksum|corrupt"):
        state_from_bytes(bytes(flipped))
    with pytest.raises(StateFormatError, match=r"(?i)checksum|corrupt|truncat"):
        state_from_bytes(data[:-10])
    with pytest.raises(StateFormatError, match=r"(?i)version"):
        state_from_bytes(data[:8] + struct.pack("<H", 999) + data[10:])
    with pytest.raises(StateFormatError):
        state_from_bytes("not bytes")  # type: ignore[arg-type]


class _Tripwire:
    """Unpickling this object would create a file: proof that code ran."""

    def __init__(self, path: str) -> None:
        self.path = path

    def __reduce__(self):
        return (Path.touch, (Path(self.path),))


def test_forged_state_with_pickled_payload_is_refused(tmp_path: Path) -> None:
    # A tampered store can forge magic, version and checksum; it must still not run code.
    from mixture.serialize import FORMAT_VERSION, MAGIC, checksum

    tripwire = tmp_path / "code-ran"
    forged_payloads = [pickle.dumps(_Tripwire(str(tripwire)))]
    buffer = io.BytesIO()
    objects = np.empty(1, dtype=object)
    objects[0] = _Tripwire(str(tripwire))
    np.savez(buffer, header=objects, unscaled_word=objects)  # object arrays are pickles
    forged_payloads.append(buffer.getvalue())
    for payload in forged_payloads:
        digest = bytes.fromhex(checksum(payload))
        forged = struct.pack("<8sH32s", MAGIC, FORMAT_VERSION, digest) + payload
        with pytest.raises(StateFormatError):
            state_from_bytes(forged)
    assert not tripwire.exists(), "loading state bytes executed pickled code"


def test_learning_from_nothing_is_harmless() -> None:
    learner = OnlineLearner(MixtureConfig(n_groups=2), seed=0)
    report = learner.learn([])
    assert report.documents == 0
    assert not learner.state.warmed_up
