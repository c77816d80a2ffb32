"""Topic matching against paho-mqtt, validation against a reference grammar, shares.

The reference for our behaviour is the MQTT 5.0 specification, section 4.7;
paho-mqtt's ``topic_matches_sub`` is an outside oracle that should agree.

Where paho and the specification differ (paho-mqtt 2.x, ``MQTTMatcher.iter_match``):

* paho does treat ``'$'`` topics specially, like section 4.7.2: a leading
  ``'+'`` or ``'#'`` does not match a topic starting with ``'$'``. No
  difference, and the strategies below put ``'$SYS'`` and ``'$x'`` first
  often to exercise it.
* paho does not validate its arguments: ``topic_matches_sub("a/#/b", ...)``
  and topics containing ``'+'`` are matched somehow instead of refused, and
  the empty topic ``''`` is matched by ``'#'``. Our :func:`matches` raises
  ``TopicError`` for those, so the comparison runs over valid filters and
  topics only; validation has its own property against a grammar.
"""

import re
from random import Random

from hypothesis import assume, given, settings
from hypothesis import strategies as st
from paho.mqtt.client import topic_matches_sub

from arxwatch.daemon.route import TopicError, TopicPattern, matches, owns, validate_filter

# Small alphabets make matches likely: empty levels, case, '$' levels.
NAME_LEVELS = st.sampled_from(["", "a", "b", "A", "$SYS", "$x"])
FILTER_LEVELS = st.one_of(NAME_LEVELS, st.just("+"))


@st.composite
def topic_filters(draw: st.DrawFn) -> str:
    levels = draw(st.lists(FILTER_LEVELS, min_size=0, max_size=5))
    if draw(st.booleans()) or levels in ([], [""]):
        levels.append("#")  # one empty level alone would be the empty (invalid) filter
    return "/".join(levels)


# filter(bool): a single empty level is the empty string, which is no topic name
topic_names = st.lists(NAME_LEVELS, min_size=1, max_size=6).map("/".join).filter(bool)


@st.composite
def filter_and_topic(draw: st.DrawFn) -> tuple[str, str]:
    """Draw a filter and a topic, half the time a topic built to fit the filter."""
    topic_filter = draw(topic_filters())
    if draw(st.booleans()):
        return topic_filter, draw(topic_names)
    levels: list[str] = []
    for level in topic_filter.split("/"):
        if level == "+":
            levels.append(draw(NAME_LEVELS))
        elif level == "#":
            levels.extend(draw(st.lists(NAME_LEVELS, max_size=3)))
        else:
            levels.append(level)
    # 'a/#' fitted with no extra levels gives 'a'; a bare '#' may give '', no topic
    return topic_filter, "/".join(levels) or draw(topic_names)


@settings(max_examples=600, deadline=None)
@given(filter_and_topic())
def test_matches_agrees_with_paho(case: tuple[str, str]) -> None:
    topic_filter, topic = case
    assert matches(topic_filter, topic) is topic_matches_sub(topic_filter, topic)


# Reference grammar for section 4.7.1, written independently of the validator:
# every level but the last is '+' or free of '+' and '#'; the last may also be '#'.
_FILTER = re.compile(r"(?:(?:\+|[^+#/]*)/)*(?:\+|#|[^+#/]*)")


@settings(max_examples=500, deadline=None)
@given(st.text(alphabet="ab/+#$", min_size=1, max_size=12))
def test_validate_filter_accepts_exactly_the_grammar(text: str) -> None:
    try:
        validate_filter(text)
    except TopicError:
        accepted = False
    else:
        accepted = True
    assert accepted is bool(_FILTER.fullmatch(text))


@st.composite
def pattern_and_topic(draw: st.DrawFn) -> tuple[TopicPattern, str]:
    """Draw a pattern and a topic, half the time a topic built to fit the pattern."""
    size = draw(st.integers(1, 5))
    named = draw(st.lists(st.booleans(), min_size=size, max_size=size))
    fixed = draw(st.lists(NAME_LEVELS, min_size=size, max_size=size))
    text = "/".join(
        f"{{n{k}}}" if is_named else level
        for k, (is_named, level) in enumerate(zip(named, fixed, strict=True))
    )
    assume(text)  # a single empty fixed level is the empty pattern
    if draw(st.booleans()):
        return TopicPattern.parse(text), draw(topic_names)
    fitted = [
        draw(NAME_LEVELS) if is_named else level
        for is_named, level in zip(named, fixed, strict=True)
    ]
    return TopicPattern.parse(text), "/".join(fitted) or draw(topic_names)


@settings(max_examples=300, deadline=None)
@given(pattern_and_topic())
def test_pattern_match_agrees_with_its_subscription(case: tuple[TopicPattern, str]) -> None:
    pattern, topic = case
    found = pattern.match(topic)
    assert (found is not None) is matches(pattern.subscription(), topic)
    if found is not None:
        levels = topic.split("/")
        assert found == {name: levels[pattern.levels.index(name)] for name in pattern.names}


# -- rendezvous hashing: minimal movement when a replica joins or leaves --------------------

KEYS = [f"site-{k}" for k in range(2000)]
replica_sets = st.lists(
    st.text(alphabet="abcdefghij-0123456789", min_size=1, max_size=8),
    min_size=2,
    max_size=8,
    unique=True,
)


def owners(replicas: list[str]) -> dict[str, str]:
    return {key: next(r for r in replicas if owns(key, r, replicas)) for key in KEYS}


@settings(max_examples=8, deadline=None)
@given(replica_sets)
def test_a_joining_replica_takes_about_its_share_and_nothing_else_moves(
    replicas: list[str],
) -> None:
    before, after = owners(replicas[:-1]), owners(replicas)
    moved = [key for key in KEYS if before[key] != after[key]]
    assert all(after[key] == replicas[-1] for key in moved)
    expected = 1 / len(replicas)
    # binomial standard deviation is at most 0.0112 at 2000 keys: 0.06 is over 5 sigma
    assert abs(len(moved) / len(KEYS) - expected) < 0.06


@settings(max_examples=10, deadline=None)
@given(replica_sets, st.randoms(use_true_random=False))
def test_owner_is_independent_of_replica_order(replicas: list[str], rng: Random) -> None:
    shuffled = list(replicas)
    rng.shuffle(shuffled)
    for key in KEYS[:200]:
        assert [owns(key, r, replicas) for r in replicas] == [
            owns(key, r, shuffled) for r in replicas
        ]
