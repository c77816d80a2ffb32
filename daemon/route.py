"""Topic routing: MQTT topic name -> (asset class, asset id, signal).

Pure: strings in, frozen results out; no MQTT client, no clock, no I/O.

* :func:`validate_filter` and :func:`validate_topic` apply the MQTT 5.0
  topic rules (section 4.7) at config load, raising :class:`TopicError`.
* :func:`matches` is MQTT topic matching, the reference the rest obeys.
* :class:`TopicPattern` is a topic with named levels (``{asset}``); it yields
  the subscription filter and extracts the named levels from a topic.
* :class:`Router` turns topics into :class:`Route` results by rules tried in
  order, discovering assets up to a limit; a topic it will not route becomes
  a :class:`Refused` with a reason, so a message callback never sees an
  exception from routing.
* :func:`owns` and :func:`share` split keys (for example sites) between
  replicas by rendezvous hashing, so each replica subscribes to its share.

References
----------
OASIS, *MQTT Version 5.0*, OASIS Standard, 7 March 2019: section 1.5.4
(UTF-8 encoded strings), section 3.3.4 (overlapping subscriptions), section
4.7 (topic names and topic filters).

D. G. Thaler and C. V. Ravishankar, "Using name-based mappings to increase
hit rates", *IEEE/ACM Transactions on Networking*, vol. 6, no. 1, pp. 1-14,
1998 (highest random weight, or rendezvous, hashing).
"""

from __future__ import annotations

import hashlib
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from types import MappingProxyType
from typing import Literal

__all__ = [
    "MAX_TOPIC_BYTES",
    "Refused",
    "RefusalReason",
    "Route",
    "RouteRule",
    "Router",
    "TopicError",
    "TopicPattern",
    "matches",
    "owns",
    "share",
    "validate_filter",
    "validate_topic",
]

MAX_TOPIC_BYTES = 65535
"""Longest topic name or filter, in UTF-8 bytes (MQTT 5.0 section 1.5.4)."""

_NAME = re.compile(r"[a-z_][a-z0-9_]*")
_PLACEHOLDER = re.compile(r"\{([^{}]*)\}")
_QUOTE_CHARS = 80  # longer values are cut in messages: a 64 KiB topic helps nobody


class TopicError(ValueError):
    """A topic name, filter or pattern breaks the MQTT rules or ours.

    Parameters
    ----------
    kind : str
        What was checked: ``"topic filter"``, ``"topic name"``,
        ``"topic pattern"`` or ``"template"``.
    text : str
        The value checked.
    problem : str
        What is wrong.
    level : int or None
        Zero-based index of the offending level, if one is to blame.

    Attributes
    ----------
    kind, text, problem, level
        As given, so the config loader can add the file and key path.
    """

    def __init__(self, kind: str, text: str, problem: str, level: int | None = None) -> None:
        self.kind = kind
        self.text = text
        self.problem = problem
        self.level = level
        quoted = text if len(text) <= _QUOTE_CHARS else text[:_QUOTE_CHARS] + "..."
        where = "" if level is None else f", found at level {level}"
        super().__init__(f"{kind} {quoted!r}: {problem}{where}")


def _check_string(kind: str, text: object) -> str:
    """Apply the rules shared by topic names and filters; return the text."""
    if not isinstance(text, str):
        raise TopicError(kind, repr(text), f"must be a string, got {type(text).__name__}")
    if not text:
        raise TopicError(kind, text, "must not be empty")
    for index, level in enumerate(text.split("/")):
        if "\x00" in level:
            raise TopicError(kind, text, "must not contain the NUL character U+0000", index)
        if any("\ud800" <= char <= "\udfff" for char in level):
            raise TopicError(kind, text, "must not contain UTF-16 surrogates", index)
    size = len(text.encode("utf-8"))
    if size > MAX_TOPIC_BYTES:
        raise TopicError(kind, text, f"is {size} bytes in UTF-8, more than {MAX_TOPIC_BYTES}")
    return text


def validate_filter(text: str) -> str:
    """Check a topic filter against MQTT 5.0 section 4.7 and return it unchanged.

    Parameters
    ----------
    text : str
        Topic filter, for example ``"site/+/ahu/#"``.

    Returns
    -------
    str
        ``text``, so the call can sit in an expression.

    Raises
    ------
    TopicError
        If the filter is empty, longer than 65,535 UTF-8 bytes, contains NUL
        or a surrogate, has ``'+'`` other than as a whole level, or ``'#'``
        other than as the whole last level. The message names the level.

    Notes
    -----
    Shared subscriptions (``$share/group/filter``, section 4.8.2) are valid
    filters but are matched by the broker differently; arxwatch splits work
    between replicas with :func:`owns` instead, and :class:`TopicPattern`
    refuses them.

    Examples
    --------
    >>> validate_filter("site/+/ahu/#")
    'site/+/ahu/#'
    >>> try:
    ...     validate_filter("site/#/x")
    ... except TopicError as err:
    ...     print(err)
    topic filter 'site/#/x': '#' must be the last level, found at level 1
    """
    _check_string("topic filter", text)
    levels = text.split("/")
    for index, level in enumerate(levels):
        if "#" in level:
            if level != "#":
                raise TopicError("topic filter", text, "'#' must be a whole level", index)
            if index != len(levels) - 1:
                raise TopicError("topic filter", text, "'#' must be the last level", index)
        elif "+" in level and level != "+":
            raise TopicError("topic filter", text, "'+' must be a whole level", index)
    return text


def validate_topic(text: str) -> str:
    """Check a topic name (what a PUBLISH carries) and return it unchanged.

    Parameters
    ----------
    text : str
        Topic name, for example ``"site/s1/ahu/ahu-1/supply-temp"``.

    Returns
    -------
    str
        ``text``.

    Raises
    ------
    TopicError
        If the name is empty, too long, contains NUL or a surrogate, or
        contains a wildcard ``'+'`` or ``'#'`` (section 4.7.1).
    """
    _check_string("topic name", text)
    for index, level in enumerate(text.split("/")):
        for wildcard in "+#":
            if wildcard in level:
                raise TopicError(
                    "topic name",
                    text,
                    f"wildcard {wildcard!r} is not allowed in a topic name",
                    index,
                )
    return text


def _match_levels(filter_levels: Sequence[str], topic_levels: Sequence[str]) -> bool:
    """Match split levels; the caller has validated both sides."""
    if topic_levels[0].startswith("$") and filter_levels[0] in ("+", "#"):
        return False  # section 4.7.2: leading wildcards never match '$' topics
    for index, level in enumerate(filter_levels):
        if level == "#":
            return True  # also matches the parent: 'a/#' matches 'a'
        if index >= len(topic_levels):
            return False
        if level != "+" and level != topic_levels[index]:
            return False
    return len(filter_levels) == len(topic_levels)


def matches(topic_filter: str, topic: str) -> bool:
    """Whether a topic name matches a topic filter (MQTT 5.0 section 4.7).

    Parameters
    ----------
    topic_filter : str
        Valid topic filter.
    topic : str
        Valid topic name.

    Returns
    -------
    bool
        True if a subscription to ``topic_filter`` receives ``topic``.
        Matching is case sensitive; empty levels are ordinary levels
        (``'+'`` matches the empty level in ``'a//b'``); ``'#'`` matches its
        parent level too; a filter starting with a wildcard does not match a
        topic starting with ``'$'`` (section 4.7.2).

    Raises
    ------
    TopicError
        If either argument is invalid.

    Examples
    --------
    >>> matches("site/#", "site")
    True
    >>> matches("+/ahu/+", "$SYS/ahu/x")
    False
    >>> matches("a/+/b", "a//b")
    True
    """
    validate_filter(topic_filter)
    validate_topic(topic)
    return _match_levels(topic_filter.split("/"), topic.split("/"))


@dataclass(frozen=True)
class TopicPattern:
    """A topic with named levels, such as ``"site/{site}/ahu/{asset}/{signal}"``.

    Build with :meth:`parse`. Each level is either fixed text or a named level
    ``{name}`` (the whole level, ``name`` matching ``[a-z_][a-z0-9_]*``, each
    name used once). Wildcards are not allowed: a named level is the ``'+'``
    of the subscription, and its value is what the topic carries there.

    Parameters
    ----------
    text : str
        The pattern as written.
    levels : tuple of str
        Fixed level text, or the name of a named level.
    named : tuple of bool
        Whether each level is named.
    """

    text: str
    levels: tuple[str, ...]
    named: tuple[bool, ...]

    @classmethod
    def parse(cls, text: str) -> TopicPattern:
        """Validate a pattern and build it.

        Parameters
        ----------
        text : str
            Pattern, e.g. ``"bldg-c/vav/{asset}/zone-temp"``.

        Returns
        -------
        TopicPattern

        Raises
        ------
        TopicError
            If a level holds ``'+'`` or ``'#'``, a brace outside a whole
            ``{name}`` level, a bad or repeated name, if the pattern is a
            if the pattern is a shared subscription.

        Examples
        --------
        >>> TopicPattern.parse("site/{site}/ahu/{asset}/{signal}").subscription()
        'site/+/ahu/+/+'
        >>> try:
        ...     TopicPattern.parse("site/{x}/{x}")
        ... except TopicError as err:
        ...     print(err)
        topic pattern 'site/{x}/{x}': name 'x' is used twice, found at level 2
        """
        _check_string("topic pattern", text)
        levels: list[str] = []
        named: list[bool] = []
        for index, level in enumerate(text.split("/")):
            if "+" in level or "#" in level:
                raise TopicError(
                    "topic pattern",
                    text,
                    "wildcards are not allowed; write a named level such as {asset}",
                    index,
                )
            if "{" in level or "}" in level:
                if not (level.startswith("{") and level.endswith("}")):
                    raise TopicError(
                        "topic pattern",
                        text,
                        "a named level must be the whole level {name}",
                        index,
                    )
                name = level[1:-1]
                if not _NAME.fullmatch(name):
                    raise TopicError(
                        "topic pattern",
                        text,
                        f"level name {name!r} must match [a-z_][a-z0-9_]*",
                        index,
                    )
                if name in (lv for lv, is_named in zip(levels, named, strict=True) if is_named):
                    raise TopicError("topic pattern", text, f"name {name!r} is used twice", index)
                levels.append(name)
                named.append(True)
            else:
                levels.append(level)
                named.append(False)
        if not named[0] and levels[0] == "$share":
            raise TopicError(
                "topic pattern",
                text,
                "shared subscriptions are not supported; replicas split sites by owns()",
                0,
            )
        return cls(text, tuple(levels), tuple(named))

    @property
    def names(self) -> tuple[str, ...]:
        """Names of the named levels, in topic order."""
        return tuple(lv for lv, is_named in zip(self.levels, self.named, strict=True) if is_named)

    def subscription(self, bound: Mapping[str, str] | None = None) -> str:
        """Return the MQTT filter that receives every topic this pattern matches.

        Parameters
        ----------
        bound : mapping of str to str, optional
            Values for some named levels, to subscribe to a share only (for
            example ``{"site": "s1"}`` for a replica that owns site ``s1``).
            Unbound named levels become ``'+'``.

        Returns
        -------
        str
            Topic filter.

        Raises
        ------
        TopicError
            If ``bound`` names a level the pattern lacks, or a value that is
            not a single non-empty topic level without wildcards.

        Examples
        --------
        >>> TopicPattern.parse("site/{site}/ahu/{asset}/{signal}").subscription({"site": "s1"})
        'site/s1/ahu/+/+'
        """
        values = dict(bound or {})
        unknown = sorted(set(values) - set(self.names))
        if unknown:
            raise TopicError("topic pattern", self.text, f"has no named level {unknown[0]!r}")
        for name, value in values.items():
            if value == "" or "/" in value:
                raise TopicError(
                    "topic pattern",
                    self.text,
                    f"value {value!r} for {{{name}}} must be one non-empty level",
                )
            validate_topic(value)
        out = [
            values.get(level, "+") if is_named else level
            for level, is_named in zip(self.levels, self.named, strict=True)
        ]
        return "/".join(out)

    def match(self, topic: str) -> dict[str, str] | None:
        """Extract the named levels from a topic name.

        Parameters
        ----------
        topic : str
            Topic name as received (assumed valid: the broker delivered it).

        Returns
        -------
        dict of str to str or None
            Named level -> its text in ``topic`` (possibly ``''``: MQTT allows
            empty levels), or None if ``topic`` does not match. Agrees with
            ``matches(self.subscription(), topic)``, including the ``'$'``
            rule when the first level is named.

        Examples
        --------
        >>> TopicPattern.parse("bldg-c/vav/{asset}/zone-temp").match("bldg-c/vav/v-12/zone-temp")
        {'asset': 'v-12'}
        """
        parts = topic.split("/")
        if len(parts) != len(self.levels):
            return None
        if self.named[0] and topic.startswith("$"):
            return None
        found: dict[str, str] = {}
        for part, level, is_named in zip(parts, self.levels, self.named, strict=True):
            if is_named:
                found[level] = part
            elif part != level:
                return None
        return found


def _template_names(kind: str, template: str) -> tuple[str, ...]:
    """Names referenced by a ``{name}`` template; any other brace is an error."""
    if not isinstance(template, str) or not template:
        raise TopicError(kind, str(template), "must be a non-empty string")
    names = tuple(_PLACEHOLDER.findall(template))
    if "{" in _PLACEHOLDER.sub("", template) or "}" in _PLACEHOLDER.sub("", template):
        raise TopicError(kind, template, "braces are only allowed around a level name: {name}")
    for name in names:
        if not _NAME.fullmatch(name):
            raise TopicError(kind, template, f"placeholder {name!r} must match [a-z_][a-z0-9_]*")
    return names


def _render(template: str, values: Mapping[str, str]) -> str:
    return _PLACEHOLDER.sub(lambda m: values[m.group(1)], template)


@dataclass(frozen=True)
class RouteRule:
    """How topics of one asset class become (asset id, signal).

    Parameters
    ----------
    asset_class : str
        Name of the asset class (the config key), e.g. ``"ahu"``.
    pattern : TopicPattern
        Topics of this class.
    asset_id : str
        Template for the asset id over the pattern's named levels, e.g.
        ``"{site}/{asset}"``.
    signal : str
        Fixed signal name (``"zone-temp"``) or a template (``"{signal}"``).
    allowed_signals : frozenset of str or None
        Signals accepted; None accepts any. With a ``"{signal}"`` level this
        keeps stray topics (diagnostics, setpoint echoes) out of the model.

    Raises
    ------
    TopicError
        If a template uses a name the pattern lacks, has stray braces, or if a
        named level of the pattern is used by neither template (two assets
        differing only in that level would be merged into one).
    ValueError
        If ``asset_class`` is empty or ``allowed_signals`` is empty.
    """

    asset_class: str
    pattern: TopicPattern
    asset_id: str
    signal: str
    allowed_signals: frozenset[str] | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.asset_class, str) or not self.asset_class:
            raise ValueError(f"asset_class must be a non-empty string, got {self.asset_class!r}")
        used: set[str] = set()
        for kind, template in (
            ("asset_id template", self.asset_id),
            ("signal template", self.signal),
        ):
            names = _template_names(kind, template)
            missing = [name for name in names if name not in self.pattern.names]
            if missing:
                raise TopicError(
                    kind,
                    template,
                    f"uses {{{missing[0]}}}, which pattern {self.pattern.text!r} does not name",
                )
            used.update(names)
        unused = [name for name in self.pattern.names if name not in used]
        if unused:
            raise TopicError(
                "topic pattern",
                self.pattern.text,
                f"named level {{{unused[0]}}} is used in neither asset_id nor signal; "
                "assets differing only there would be merged",
            )
        if self.allowed_signals is not None and not self.allowed_signals:
            raise ValueError(
                f"allowed_signals of asset class {self.asset_class!r} is empty; "
                "use None to accept any signal"
            )


@dataclass(frozen=True)
class Route:
    """Where a message goes.

    Parameters
    ----------
    asset_class : str
        Class of the rule that matched.
    asset_id : str
        Rendered asset id.
    signal : str
        Rendered signal name.
    """

    asset_class: str
    asset_id: str
    signal: str


RefusalReason = Literal[
    "no matching rule", "empty level", "signal not allowed", "asset limit", "asset class conflict"
]


@dataclass(frozen=True)
class Refused:
    """Why a topic was not routed; the caller counts it by ``reason``.

    Parameters
    ----------
    reason : str
        One of :data:`RefusalReason`; short and fixed, so usable as a metric label.
    asset_class : str or None
        Class of the rule that matched, if one did.
    """

    reason: RefusalReason
    asset_class: str | None = None


@dataclass
class Router:
    """Route topics by rules, discovering assets up to a limit.

    Rule order: rules are tried in the order given and the **first** rule
    whose pattern matches decides, even if it then refuses the topic (a
    disallowed signal, the asset limit). List specific rules before general
    ones. Later rules are not consulted, so one topic always has one route.

    Discovery: the first routed topic of an asset id registers it with its
    class. Once ``max_assets`` ids are known, topics of new assets are refused
    with reason ``"asset limit"``; known assets keep routing. An asset id
    already registered under another class is refused with
    ``"asset class conflict"``. Which assets win at the limit depends on
    arrival order.

    Never raises in :meth:`route`: a message callback gets a :class:`Route`
    or a :class:`Refused`. Not thread safe; call from one thread.

    Duplicate delivery: :meth:`subscriptions` may overlap (``site/+/ahu/#``
    and ``site/s1/ahu/a1/t``). MQTT 5.0 section 3.3.4 (and 3.1.1 section
    3.3.5) let the broker send one copy per matching subscription, or a single
    copy; either way every copy routes the same way here, so ingest must be
    idempotent for a repeated (asset, signal, timestamp) sample.

    Parameters
    ----------
    rules : sequence of RouteRule
        At least one, in priority order.
    max_assets : int
        Most asset ids this router admits (cardinality cap), >= 1.

    Raises
    ------
    ValueError
        If ``rules`` is empty or ``max_assets`` is not an integer >= 1.

    Examples
    --------
    >>> rule = RouteRule("vav", TopicPattern.parse("bldg-c/vav/{asset}/zone-temp"),
    ...                  asset_id="bldg-c/{asset}", signal="zone-temp")
    >>> router = Router([rule], max_assets=1)
    >>> router.route("bldg-c/vav/v-1/zone-temp")
    Route(asset_class='vav', asset_id='bldg-c/v-1', signal='zone-temp')
    >>> router.route("bldg-c/vav/v-2/zone-temp")
    Refused(reason='asset limit', asset_class='vav')
    """

    rules: Sequence[RouteRule]
    max_assets: int
    _assets: dict[str, str] = field(default_factory=dict, init=False, repr=False)

    def __post_init__(self) -> None:
        self.rules = tuple(self.rules)
        if not self.rules:
            raise ValueError("rules must hold at least one RouteRule")
        if (
            isinstance(self.max_assets, bool)
            or not isinstance(self.max_assets, int)
            or self.max_assets < 1
        ):
            raise ValueError(f"max_assets must be an integer >= 1, got {self.max_assets!r}")

    @property
    def assets(self) -> Mapping[str, str]:
        """Discovered asset ids -> asset class (read-only live view)."""
        return MappingProxyType(self._assets)

    def admit(self, asset_id: str, asset_class: str) -> None:
        """Register an asset known from a checkpoint, as if its topic had been routed.

        Raises
        ------
        ValueError
            If ``asset_class`` names no rule, the id is known under another
            class, or the asset limit is reached.
        """
        if asset_class not in {rule.asset_class for rule in self.rules}:
            raise ValueError(f"no asset class {asset_class!r} among the rules")
        known = self._assets.get(asset_id)
        if known is not None and known != asset_class:
            raise ValueError(f"asset {asset_id!r} is known as a {known!r}, not a {asset_class!r}")
        if known is None and len(self._assets) >= self.max_assets:
            raise ValueError(f"asset limit {self.max_assets} reached; cannot admit {asset_id!r}")
        self._assets[asset_id] = asset_class

    def subscriptions(self) -> tuple[str, ...]:
        """Return the filters to subscribe to, deduplicated, in rule order.

        Returns
        -------
        tuple of str
            One filter per distinct rule pattern subscription.
        """
        return tuple(dict.fromkeys(rule.pattern.subscription() for rule in self.rules))

    def route(self, topic: str) -> Route | Refused:
        """Route one received topic name.

        Parameters
        ----------
        topic : str
            Topic name as delivered by the broker.

        Returns
        -------
        Route or Refused
            The route, or why there is none: ``"no matching rule"``,
            ``"empty level"`` (a named level used by the rule is empty, as in
            ``site//ahu/a1/t``), ``"signal not allowed"``, ``"asset limit"``
            or ``"asset class conflict"``.
        """
        for rule in self.rules:
            values = rule.pattern.match(topic)
            if values is None:
                continue
            if "" in values.values():
                return Refused("empty level", rule.asset_class)
            signal = _render(rule.signal, values)
            if rule.allowed_signals is not None and signal not in rule.allowed_signals:
                return Refused("signal not allowed", rule.asset_class)
            asset_id = _render(rule.asset_id, values)
            known = self._assets.get(asset_id)
            if known is None:
                if len(self._assets) >= self.max_assets:
                    return Refused("asset limit", rule.asset_class)
                self._assets[asset_id] = rule.asset_class
            elif known != rule.asset_class:
                return Refused("asset class conflict", rule.asset_class)
            return Route(rule.asset_class, asset_id, signal)
        return Refused("no matching rule")


def _weight(key: str, replica: str) -> int:
    """Stable pseudo-random weight of (key, replica); same in every process."""
    digest = hashlib.blake2b(digest_size=8)
    digest.update(replica.encode("utf-8"))
    digest.update(b"\x00")  # replica names hold no NUL, so the pair is unambiguous
    digest.update(key.encode("utf-8"))
    return int.from_bytes(digest.digest(), "big")


def _check_replicas(replica: str, replicas: Sequence[str]) -> None:
    if isinstance(replicas, str):
        raise ValueError("replicas must be a sequence of names, not one string")
    names = list(replicas)
    if not names:
        raise ValueError("replicas must name at least one replica")
    for name in names:
        if not isinstance(name, str) or not name or "\x00" in name:
            raise ValueError(f"replica names must be non-empty strings without NUL, got {name!r}")
    if len(set(names)) != len(names):
        raise ValueError(f"replica names must be unique, got {names!r}")
    if replica not in names:
        raise ValueError(f"replica {replica!r} is not one of {names!r}")


def owns(key: str, replica: str, replicas: Sequence[str]) -> bool:
    """Whether ``replica`` owns ``key`` under rendezvous hashing.

    Each key goes to the replica with the highest weight
    ``blake2b(replica, key)``; ties (astronomically rare with 64-bit weights)
    go to the greater name. Every replica computes the same answer with no
    coordination, independent of the order of ``replicas``. When a replica
    joins, only the keys it now wins move (about ``1/(n+1)`` of them), all to
    it; when one leaves, only its keys move.

    Parameters
    ----------
    key : str
        Key to place, e.g. the site level of the topic.
    replica : str
        This replica's stable identity (from the orchestrator).
    replicas : sequence of str
        All replica identities, unique, including ``replica``.

    Returns
    -------
    bool

    Raises
    ------
    ValueError
        If ``replicas`` is empty, has duplicates or bad names, or lacks
        ``replica``.

    References
    ----------
    D. G. Thaler and C. V. Ravishankar, "Using name-based mappings to increase
    hit rates", *IEEE/ACM Transactions on Networking*, 6(1):1-14, 1998.

    Examples
    --------
    >>> sum(owns("site-7", r, ["a", "b", "c"]) for r in ["a", "b", "c"])
    1
    """
    _check_replicas(replica, replicas)
    return max(replicas, key=lambda name: (_weight(key, name), name)) == replica


def share(keys: Iterable[str], replica: str, replicas: Sequence[str]) -> tuple[str, ...]:
    """Return the keys ``replica`` owns, in input order without repeats.

    Parameters
    ----------
    keys : iterable of str
        Keys to split, e.g. all configured sites.
    replica : str
        This replica.
    replicas : sequence of str
        All replicas.

    Returns
    -------
    tuple of str
        The owned keys; the shares of all replicas partition ``keys``.

    Raises
    ------
    ValueError
        As :func:`owns`.
    """
    _check_replicas(replica, replicas)
    return tuple(key for key in dict.fromkeys(keys) if owns(key, replica, replicas))
