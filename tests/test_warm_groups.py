"""The groups the lifecycle starts from (mixture.warm_groups): the warm-up fit's groups are
joined while one Dirichlet-multinomial group explains a pair better than two, and, with
``lifecycle.warm_up_splits``, split while a cut passes the birth test's threshold.

Streams are invented (tests/lifecycle_streams.py: known unigram topics, generated here).
Outside check: the groups of the warm-up documents are scored against the topics they were
drawn from with ``sklearn.metrics.normalized_mutual_info_score``; the Bayes factor itself is
checked against a hand-computed marginal and scipy in tests/test_lifecycle.py.
"""

from __future__ import annotations

import numpy as np
from sklearn.metrics import normalized_mutual_info_score

from mixture.config import MixtureConfig
from mixture.labelled import LabelledItem
from mixture.lifecycle import BIRTH, MERGE
from mixture.lifecycle_config import LifecycleConfig
from mixture.online import OnlineLearner
from mixture.routing import route_texts
from mixture.serialize import state_from_bytes, state_to_bytes
from tests.lifecycle_streams import TopicStream

WARM_UP = {"warmup_documents": 600, "warmup_tokens": 0, "n_restarts": 1}


def _learn(learner: OnlineLearner, texts: list[str], size: int = 256) -> list:
    events = []
    for start in range(0, len(texts), size):
        events += learner.learn(texts[start : start + size]).events
    return events


def test_a_warm_up_of_one_topic_at_k_given_keeps_free_slots():
    """Four groups given, the warm-up holds one topic: the warm-up fit's groups are joined
    into one (merge events at the warm-up's end, the survivor keeps its id, the absorbed ids
    are gone), and the two topics that come later are born into the free slots with new
    ids; at the end every topic routes to a group of its own."""
    stream = TopicStream(3, seed=4)
    labels = np.concatenate([stream.labels(600, [0]), stream.labels(3000, [0, 1, 2])])
    texts = stream.messages(labels)
    config = MixtureConfig(**WARM_UP, n_groups=4, lifecycle=LifecycleConfig(enabled=True))
    learner = OnlineLearner(config, seed=0)
    warm = learner.learn(texts[:600])
    state = learner.state
    assert state.warmed_up
    assert [e.kind for e in warm.events] == [MERGE] * 3
    assert all(e.position == 600 and e.evidence["log_bayes_factor"] > 0 for e in warm.events)
    assert state.n_groups == 1
    survivor = int(state.group_ids[0])
    assert survivor in {0, 1, 2, 3}
    assert {e.groups[0] for e in warm.events} == {survivor}
    assert state.next_group_id == 4  # the absorbed ids are never given again
    later = _learn(learner, texts[600:])
    born = [e for e in later if e.kind == BIRTH]
    assert len(born) >= 2 and all(e.groups[0] >= 4 for e in born)
    tail = np.arange(len(texts) - 1000, len(texts))
    routed = route_texts(state, [texts[i] for i in tail]).group
    # sklearn's NMI of the routed groups against the invented topics.
    assert normalized_mutual_info_score(labels[tail], routed) > 0.9


def test_without_the_lifecycle_the_warm_up_keeps_every_group():
    stream = TopicStream(3, seed=4)
    texts = stream.messages(stream.labels(600, [0]))
    learner = OnlineLearner(MixtureConfig(**WARM_UP, n_groups=4), seed=0)
    assert learner.learn(texts).events == []
    assert learner.state.n_groups == 4


def test_a_warm_up_of_three_topics_from_two_groups_ends_with_three_groups():
    """K unknown (2 groups at the start, the ceiling 4), three topics in the warm-up: with
    warm-up splits the fit grows to three groups, one per topic (sklearn NMI > 0.9 on the
    warm-up documents), the new one a birth event with the next id; without splits (the
    default) it keeps its two groups."""
    stream = TopicStream(3, seed=5)
    labels = stream.labels(600, [0, 1, 2])
    texts = stream.messages(labels)
    groups = {}
    for splits in (False, True):
        lifecycle = LifecycleConfig(enabled=True, warm_up_splits=splits)
        learner = OnlineLearner(MixtureConfig(**WARM_UP, n_groups=2, lifecycle=lifecycle), seed=0)
        report = learner.learn(texts)
        state = learner.state
        groups[splits] = state.n_groups
        if splits:
            assert [e.kind for e in report.events] == [BIRTH]
            assert report.events[0].evidence["log_bayes_factor"] > 5.0
            assert list(state.group_ids) == [0, 1, 2]
            routed = route_texts(state, texts).group
            assert normalized_mutual_info_score(labels, routed) > 0.9
        else:
            assert report.events == []
    assert groups == {False: 2, True: 3}


def test_warm_up_splits_stop_at_the_ceiling():
    stream = TopicStream(4, seed=6)
    texts = stream.messages(stream.labels(600, [0, 1, 2, 3]))
    lifecycle = LifecycleConfig(enabled=True, warm_up_splits=True, max_groups=3)
    learner = OnlineLearner(MixtureConfig(**WARM_UP, n_groups=2, lifecycle=lifecycle), seed=0)
    learner.learn(texts)
    assert learner.state.n_groups == 3


def test_two_groups_holding_labelled_documents_are_never_joined():
    """One topic in the warm-up, three groups, examples of that topic given to groups 0 and 1:
    the two are kept apart (operators said they differ) and group 2 joins one of them, which
    keeps its id."""
    stream = TopicStream(3, seed=4)
    texts = stream.messages(stream.labels(610, [0]))
    config = MixtureConfig(**WARM_UP, n_groups=3, lifecycle=LifecycleConfig(enabled=True))
    learner = OnlineLearner(config, seed=0)
    learner.learn_labelled(
        [LabelledItem(f"e{i}", texts[600 + i], i % 2, "example") for i in range(10)]
    )
    report = learner.learn(texts[:600])
    state = learner.state
    assert [e.kind for e in report.events] == [MERGE]
    assert report.events[0].groups == (report.events[0].groups[0], 2)
    assert sorted(int(g) for g in state.group_ids) == [0, 1]


def test_the_joined_warm_up_is_a_function_of_the_stream():
    """Saved and loaded before the call that ends the warm-up (as the worker checkpoints),
    the joins give the same events and state bytes."""
    stream = TopicStream(3, seed=4)
    texts = stream.messages(stream.labels(600, [0]))
    config = MixtureConfig(**WARM_UP, n_groups=4, lifecycle=LifecycleConfig(enabled=True))
    whole = OnlineLearner(config, seed=0)
    events = _learn(whole, texts)
    assert [e.kind for e in events] == [MERGE] * 3
    pieces = OnlineLearner(config, seed=0)
    pieces.learn(texts[:512])
    pieces = OnlineLearner.from_state(state_from_bytes(state_to_bytes(pieces.state)))
    again = pieces.learn(texts[512:]).events
    assert [e.to_dict() for e in again] == [e.to_dict() for e in events]
    assert state_to_bytes(pieces.state) == state_to_bytes(whole.state)


def test_a_group_holding_labelled_documents_survives_the_joins_with_its_id():
    """One topic, four groups, one example of it given to one group (each of the four in
    turn): the joins leave that group, with its id, whether or not it has the most
    documents."""
    stream = TopicStream(3, seed=4)
    texts = stream.messages(stream.labels(601, [0]))
    config = MixtureConfig(**WARM_UP, n_groups=4, lifecycle=LifecycleConfig(enabled=True))
    for group in range(4):
        learner = OnlineLearner(config, seed=0)
        learner.learn_labelled([LabelledItem("e", texts[600], group, "example")])
        report = learner.learn(texts[:600])
        assert [e.kind for e in report.events] == [MERGE] * 3
        assert [int(g) for g in learner.state.group_ids] == [group]
