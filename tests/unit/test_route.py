"""Topic validation, matching, patterns, routing rules, discovery limit, replica shares."""

import subprocess
import sys

import pytest

from arxwatch.daemon.route import (
    MAX_TOPIC_BYTES,
    Refused,
    Route,
    Router,
    RouteRule,
    TopicError,
    TopicPattern,
    matches,
    owns,
    share,
    validate_filter,
    validate_topic,
)

# -- validation (MQTT 5.0 section 4.7) ------------------------------------------------------


@pytest.mark.parametrize(
    "text", ["#", "+", "a/#", "+/+", "a//b", "/", "$SYS/#", "a/+/b/#", "é/ü", "a/$x/+"]
)
def test_valid_filters_come_back_unchanged(text: str) -> None:
    assert validate_filter(text) == text


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("site/#/x", r"topic filter 'site/#/x': '#' must be the last level, found at level 1"),
        ("a/b#", r"'#' must be a whole level, found at level 1"),
        ("a+/b", r"'\+' must be a whole level, found at level 0"),
        ("#/", r"'#' must be the last level, found at level 0"),
        ("", r"must not be empty"),
        ("a/\x00", r"NUL character U\+0000, found at level 1"),
        ("a/\ud800", r"surrogates, found at level 1"),
    ],
)
def test_invalid_filters_say_what_and_where(text: str, message: str) -> None:
    with pytest.raises(TopicError, match=message):
        validate_filter(text)


def test_topic_error_is_a_value_error_with_fields() -> None:
    with pytest.raises(ValueError) as info:
        validate_filter("a/#/b")
    err = info.value
    assert isinstance(err, TopicError)
    assert (err.kind, err.text, err.level) == ("topic filter", "a/#/b", 1)
    assert err.problem == "'#' must be the last level"


def test_length_limit_counts_utf8_bytes() -> None:
    validate_filter("a" * MAX_TOPIC_BYTES)
    with pytest.raises(TopicError, match=r"65536 bytes in UTF-8, more than 65535"):
        validate_filter("a" * (MAX_TOPIC_BYTES + 1))
    # 'é' is two bytes: 32768 characters are 65536 bytes
    with pytest.raises(TopicError, match=r"65536 bytes"):
        validate_topic("é" * 32768)


def test_long_values_are_shortened_in_messages() -> None:
    with pytest.raises(TopicError) as info:
        validate_topic("a" * 70000)
    assert len(str(info.value)) < 200


@pytest.mark.parametrize(("text", "level"), [("a/+", 1), ("#", 0), ("a/b#c", 1)])
def test_topic_names_refuse_wildcards(text: str, level: int) -> None:
    with pytest.raises(TopicError, match=rf"not allowed in a topic name, found at level {level}"):
        validate_topic(text)


def test_non_strings_are_refused_as_value_errors() -> None:
    with pytest.raises(TopicError, match=r"must be a string, got int"):
        validate_filter(123)  # type: ignore[arg-type]


# -- matching -------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("topic_filter", "topic", "expected"),
    [
        ("a/#", "a", True),  # '#' matches the parent level
        ("a/#", "a/b/c", True),
        ("#", "a/b", True),
        ("+", "a/b", False),
        ("a/+/b", "a//b", True),  # empty levels are ordinary levels
        ("+/+", "/", True),
        ("+", "/", False),
        ("a", "A", False),  # case sensitive
        ("#", "$SYS/broker", False),  # section 4.7.2
        ("+/broker", "$SYS/broker", False),
        ("$SYS/#", "$SYS/broker", True),
        ("$SYS/#", "$SYS", True),
        ("a/+", "a/$x", True),  # '$' matters only in the first level
        ("a/b", "a/b/c", False),
        ("a/b/c", "a/b", False),
    ],
)
def test_matching(topic_filter: str, topic: str, expected: bool) -> None:
    assert matches(topic_filter, topic) is expected


def test_matching_validates_both_sides() -> None:
    with pytest.raises(TopicError, match=r"topic filter 'a/#/b'"):
        matches("a/#/b", "a")
    with pytest.raises(TopicError, match=r"topic name 'a/\+'"):
        matches("a/+", "a/+")


# -- patterns -------------------------------------------------------------------------------


def test_pattern_subscription_and_extraction() -> None:
    pattern = TopicPattern.parse("site/{site}/ahu/{asset}/{signal}")
    assert pattern.names == ("site", "asset", "signal")
    assert pattern.subscription() == "site/+/ahu/+/+"
    assert pattern.match("site/s1/ahu/ahu-2/supply-temp") == {
        "site": "s1",
        "asset": "ahu-2",
        "signal": "supply-temp",
    }
    assert pattern.match("site/s1/ahu/ahu-2") is None
    assert pattern.match("site/s1/vav/ahu-2/t") is None
    assert pattern.match("site/s1/ahu/ahu-2/t/extra") is None


def test_pattern_with_fixed_signal_and_empty_level() -> None:
    pattern = TopicPattern.parse("bldg-c/vav/{asset}/zone-temp")
    assert pattern.subscription() == "bldg-c/vav/+/zone-temp"
    assert pattern.match("bldg-c/vav/v-12/zone-temp") == {"asset": "v-12"}
    assert pattern.match("bldg-c/vav//zone-temp") == {"asset": ""}
    assert pattern.match("bldg-c/vav/v-12/Zone-Temp") is None


def test_pattern_leading_name_does_not_match_dollar_topics() -> None:
    pattern = TopicPattern.parse("{site}/ahu/{asset}")
    assert pattern.match("$SYS/ahu/x") is None
    assert not matches(pattern.subscription(), "$SYS/ahu/x")
    assert TopicPattern.parse("$SYS/{what}").match("$SYS/uptime") == {"what": "uptime"}


def test_pattern_subscription_bound_to_a_share() -> None:
    pattern = TopicPattern.parse("site/{site}/ahu/{asset}/{signal}")
    assert pattern.subscription({"site": "s1"}) == "site/s1/ahu/+/+"
    with pytest.raises(TopicError, match=r"has no named level 'building'"):
        pattern.subscription({"building": "b"})
    with pytest.raises(TopicError, match=r"value '' for \{site\} must be one non-empty level"):
        pattern.subscription({"site": ""})
    with pytest.raises(TopicError, match=r"value 'a/b' for \{site\}"):
        pattern.subscription({"site": "a/b"})
    with pytest.raises(TopicError, match=r"wildcard '\+'"):
        pattern.subscription({"site": "+"})


@pytest.mark.parametrize(
    ("text", "message"),
    [
        (
            "site/+/x",
            r"wildcards are not allowed; write a named level such as \{asset\}, "
            r"found at level 1",
        ),
        ("site/#", r"wildcards are not allowed.*level 1"),
        ("site/x{asset}", r"a named level must be the whole level \{name\}, found at level 1"),
        ("site/{asset", r"whole level \{name\}, found at level 1"),
        ("site/{Asset}", r"level name 'Asset' must match \[a-z_\]\[a-z0-9_\]\*, found at level 1"),
        ("site/{}", r"level name '' must match"),
        ("{a}/{b}/{a}", r"name 'a' is used twice, found at level 2"),
        ("$share/g/{asset}", r"shared subscriptions are not supported"),
        ("", r"topic pattern '': must not be empty"),
    ],
)
def test_bad_patterns(text: str, message: str) -> None:
    with pytest.raises(TopicError, match=message):
        TopicPattern.parse(text)


# -- rules and router -----------------------------------------------------------------------


def ahu_rule(**kwargs: object) -> RouteRule:
    options: dict[str, object] = {
        "asset_id": "{site}/{asset}",
        "signal": "{signal}",
        "allowed_signals": None,
    }
    options.update(kwargs)
    return RouteRule("ahu", TopicPattern.parse("site/{site}/ahu/{asset}/{signal}"), **options)  # type: ignore[arg-type]


def vav_rule() -> RouteRule:
    return RouteRule(
        "vav",
        TopicPattern.parse("bldg-c/vav/{asset}/zone-temp"),
        asset_id="bldg-c/{asset}",
        signal="zone-temp",
    )


def test_route_renders_templates() -> None:
    router = Router([ahu_rule(), vav_rule()], max_assets=10)
    assert router.route("site/s1/ahu/ahu-2/supply-temp") == Route("ahu", "s1/ahu-2", "supply-temp")
    assert router.route("bldg-c/vav/v-7/zone-temp") == Route("vav", "bldg-c/v-7", "zone-temp")
    assert dict(router.assets) == {"s1/ahu-2": "ahu", "bldg-c/v-7": "vav"}


def test_unmatched_topic_is_refused() -> None:
    router = Router([vav_rule()], max_assets=10)
    assert router.route("bldg-c/vav/v-7/zone-rh") == Refused("no matching rule")
    assert router.assets == {}


def test_first_matching_rule_wins_even_when_it_refuses() -> None:
    special = RouteRule(
        "rooftop",
        TopicPattern.parse("site/s9/ahu/{asset}/{signal}"),
        asset_id="s9/{asset}",
        signal="{signal}",
        allowed_signals=frozenset({"supply-temp"}),
    )
    router = Router([special, ahu_rule()], max_assets=10)
    assert router.route("site/s9/ahu/a1/supply-temp") == Route("rooftop", "s9/a1", "supply-temp")
    assert router.route("site/s9/ahu/a1/fan-speed") == Refused("signal not allowed", "rooftop")
    assert router.route("site/s1/ahu/a1/fan-speed") == Route("ahu", "s1/a1", "fan-speed")
    reversed_router = Router([ahu_rule(), special], max_assets=10)
    assert reversed_router.route("site/s9/ahu/a1/fan-speed") == Route("ahu", "s9/a1", "fan-speed")


def test_disallowed_signal_does_not_discover_an_asset() -> None:
    router = Router([ahu_rule(allowed_signals=frozenset({"supply-temp"}))], max_assets=10)
    assert router.route("site/s1/ahu/a1/diagnostic") == Refused("signal not allowed", "ahu")
    assert router.assets == {}


def test_asset_limit_refuses_new_assets_only() -> None:
    router = Router([ahu_rule()], max_assets=2)
    assert isinstance(router.route("site/s1/ahu/a1/t"), Route)
    assert isinstance(router.route("site/s1/ahu/a2/t"), Route)
    assert router.route("site/s1/ahu/a3/t") == Refused("asset limit", "ahu")
    assert router.route("site/s1/ahu/a1/other-signal") == Route("ahu", "s1/a1", "other-signal")
    assert len(router.assets) == 2


def test_empty_named_level_is_refused() -> None:
    router = Router([ahu_rule()], max_assets=10)
    assert router.route("site//ahu/a1/t") == Refused("empty level", "ahu")
    assert router.route("site/s1/ahu/a1/") == Refused("empty level", "ahu")
    assert router.assets == {}


def test_empty_fixed_level_is_an_ordinary_level() -> None:
    rule = RouteRule("ahu", TopicPattern.parse("/plant//{asset}"), asset_id="{asset}", signal="t")
    router = Router([rule], max_assets=10)
    assert router.subscriptions() == ("/plant//+",)
    assert router.route("/plant//a1") == Route("ahu", "a1", "t")
    assert router.route("plant//a1") == Refused("no matching rule")


def test_same_asset_id_under_two_classes_is_a_conflict() -> None:
    first = RouteRule("ahu", TopicPattern.parse("x/{asset}/t"), asset_id="{asset}", signal="t")
    second = RouteRule("vav", TopicPattern.parse("y/{asset}/t"), asset_id="{asset}", signal="t")
    router = Router([first, second], max_assets=10)
    assert router.route("x/a1/t") == Route("ahu", "a1", "t")
    assert router.route("y/a1/t") == Refused("asset class conflict", "vav")


def test_dollar_topics_are_not_routed_by_leading_named_levels() -> None:
    rule = RouteRule(
        "ahu", TopicPattern.parse("{site}/ahu/{asset}"), asset_id="{site}/{asset}", signal="t"
    )
    assert Router([rule], max_assets=10).route("$SYS/ahu/a1") == Refused("no matching rule")


def test_route_never_raises_on_odd_topics() -> None:
    router = Router([ahu_rule()], max_assets=10)
    for topic in ["", "/", "#", "site/+/ahu/+/+", "site/\x00/ahu/a/t", "a" * 70000]:
        assert isinstance(router.route(topic), Route | Refused)


def test_subscriptions_are_deduplicated_in_rule_order() -> None:
    again = RouteRule(
        "ahu2", TopicPattern.parse("site/{s}/ahu/{a}/{sig}"), asset_id="{s}:{a}", signal="{sig}"
    )
    router = Router([vav_rule(), ahu_rule(), again], max_assets=10)
    assert router.subscriptions() == ("bldg-c/vav/+/zone-temp", "site/+/ahu/+/+")


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"asset_id": "{site}/{unit}"}, r"uses \{unit\}, which pattern .* does not name"),
        ({"asset_id": "{asset}"}, r"named level \{site\} is used in neither asset_id nor signal"),
        ({"asset_id": "{site}/{asset}}"}, r"braces are only allowed around a level name"),
        ({"asset_id": "{site}/{asset:>3}"}, r"placeholder 'asset:>3' must match"),
        ({"signal": ""}, r"signal template '': must be a non-empty string"),
        ({"allowed_signals": frozenset()}, r"allowed_signals of asset class 'ahu' is empty"),
    ],
)
def test_bad_rules(kwargs: dict[str, object], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        ahu_rule(**kwargs)


def test_bad_router_settings() -> None:
    with pytest.raises(ValueError, match=r"at least one RouteRule"):
        Router([], max_assets=1)
    for bad in (0, True, 2.5):
        with pytest.raises(ValueError, match=r"max_assets must be an integer >= 1"):
            Router([vav_rule()], max_assets=bad)  # type: ignore[arg-type]
    with pytest.raises(ValueError, match=r"asset_class must be a non-empty string"):
        RouteRule("", TopicPattern.parse("a/{x}"), asset_id="{x}", signal="t")


# -- replica shares (rendezvous hashing) ----------------------------------------------------

REPLICAS = ["arxwatch-0", "arxwatch-1", "arxwatch-2"]


def test_every_key_has_exactly_one_owner() -> None:
    sites = [f"site-{k}" for k in range(300)]
    shares = [share(sites, replica, REPLICAS) for replica in REPLICAS]
    assert sorted(key for part in shares for key in part) == sorted(sites)
    assert all(80 <= len(part) <= 120 for part in shares)  # about a third each


def test_owner_does_not_depend_on_replica_order() -> None:
    for key in ("s1", "s2", "north-campus"):
        assert [owns(key, r, REPLICAS) for r in REPLICAS] == [
            owns(key, r, list(reversed(REPLICAS))) for r in REPLICAS
        ]


def test_share_keeps_input_order_without_repeats() -> None:
    keys = ["s3", "s1", "s3", "s2", "s1"]
    owned = [share(keys, r, REPLICAS) for r in REPLICAS]
    assert sorted(k for part in owned for k in part) == ["s1", "s2", "s3"]
    for part in owned:
        assert list(part) == [k for k in ("s3", "s1", "s2") if k in part]


# Pinned owners: blake2b weights are the same on every machine and in every process.
PINNED = {"site-0": "arxwatch-0", "site-2": "arxwatch-1", "north-campus": "arxwatch-2"}


def test_owners_are_pinned() -> None:
    for key, owner in PINNED.items():
        assert [r for r in REPLICAS if owns(key, r, REPLICAS)] == [owner]


def test_owners_do_not_depend_on_the_hash_seed() -> None:
    code = (
        "from arxwatch.daemon.route import owns\n"
        f"print([[r for r in {REPLICAS!r} if owns(k, r, {REPLICAS!r})] for k in {list(PINNED)!r}])"
    )
    seen = set()
    for seed in ("1", "2"):
        result = subprocess.run(
            [sys.executable, "-c", code],
            capture_output=True,
            text=True,
            check=True,
            env={"PYTHONHASHSEED": seed, "PATH": ""},
        )
        seen.add(result.stdout)
    assert seen == {repr([[owner] for owner in PINNED.values()]) + "\n"}


@pytest.mark.parametrize(
    ("replica", "replicas", "message"),
    [
        ("a", [], r"at least one replica"),
        ("a", "abc", r"not one string"),
        ("a", ["a", "a"], r"must be unique"),
        ("a", ["a", ""], r"non-empty strings without NUL, got ''"),
        ("z", ["a", "b"], r"replica 'z' is not one of \['a', 'b'\]"),
    ],
)
def test_bad_replica_lists(replica: str, replicas: list[str], message: str) -> None:
    with pytest.raises(ValueError, match=message):
        owns("s1", replica, replicas)
    with pytest.raises(ValueError, match=message):
        share(["s1"], replica, replicas)


def test_admit_registers_known_assets_within_the_limit() -> None:
    rule = RouteRule("vav", TopicPattern.parse("s/{asset}/t"), asset_id="{asset}", signal="t")
    router = Router([rule], max_assets=1)
    router.admit("v-1", "vav")
    router.admit("v-1", "vav")  # again: fine
    assert router.route("s/v-1/t") == Route("vav", "v-1", "t")
    with pytest.raises(ValueError, match="asset limit 1 reached"):
        router.admit("v-2", "vav")
    with pytest.raises(ValueError, match="no asset class 'ahu'"):
        router.admit("v-1", "ahu")
