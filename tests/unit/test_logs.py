"""Log set-up: text and JSON lines, extra fields, exceptions, rate limiting with a fake clock."""

import io
import json
import logging
import re
import sys
from collections.abc import Iterator
from datetime import UTC, datetime

import pytest

from arxwatch.daemon.logs import JsonFormatter, RateLimitFilter, TextFormatter, configure_logging

CREATED_S = 1_796_188_848.123  # 2026-12-02T05:20:48.123Z


@pytest.fixture
def root() -> Iterator[logging.Logger]:
    """Yield the root logger; restore its handlers and level afterwards."""
    logger = logging.getLogger()
    handlers, level = list(logger.handlers), logger.level
    try:
        yield logger
    finally:
        for handler in logger.handlers:
            if handler not in handlers:
                logger.removeHandler(handler)
                handler.close()
        logger.setLevel(level)


def record(
    msg: str = "asset %s stale",
    args: tuple[object, ...] = ("ahu-c2",),
    *,
    level: int = logging.WARNING,
    name: str = "arxwatch.daemon.ingest",
    **extra: object,
) -> logging.LogRecord:
    rec = logging.LogRecord(name, level, __file__, 1, msg, args, None)
    rec.created = CREATED_S
    rec.msecs = 123.0
    rec.__dict__.update(extra)
    return rec


def strict_json(line: str) -> dict[str, object]:
    def refuse(constant: str) -> object:
        raise ValueError(f"not JSON: {constant}")

    # RFC 8259 has no NaN or Infinity; json.loads accepts them unless told not to.
    parsed = json.loads(line, parse_constant=refuse)
    assert isinstance(parsed, dict)
    return parsed


# --- formats ------------------------------------------------------------------------------


def test_timestamp_is_utc_with_milliseconds() -> None:
    line = TextFormatter().format(record())
    # the same instant written by datetime, as an outside reference
    expected = datetime.fromtimestamp(CREATED_S, UTC).isoformat(timespec="milliseconds")
    assert expected == "2026-12-02T05:20:48.123+00:00"
    assert line.startswith(expected.replace("+00:00", "Z") + " ")


def test_text_line() -> None:
    line = TextFormatter().format(record())
    assert line == "2026-12-02T05:20:48.123Z WARNING arxwatch.daemon.ingest: asset ahu-c2 stale"


def test_text_line_with_extra_fields() -> None:
    line = TextFormatter().format(record(asset="ahu-c2", reason="not json", count=3))
    assert line.endswith(' asset=ahu-c2 reason="not json" count=3')


def test_text_exception_follows_the_line() -> None:
    try:
        raise ValueError("bad checkpoint for vav-3-14")
    except ValueError:
        rec = record("checkpoint failed", (), level=logging.ERROR)
        rec.exc_info = sys.exc_info()
    first, *rest = TextFormatter().format(rec).splitlines()
    assert first.endswith("ERROR arxwatch.daemon.ingest: checkpoint failed")
    assert rest[0] == "Traceback (most recent call last):"
    assert rest[-1] == "ValueError: bad checkpoint for vav-3-14"


def test_json_line_with_extra_fields() -> None:
    line = JsonFormatter().format(record(asset="ahu-c2", count=3, site="Larkspur Yard"))
    assert "\n" not in line
    assert strict_json(line) == {
        "ts": "2026-12-02T05:20:48.123Z",
        "level": "WARNING",
        "logger": "arxwatch.daemon.ingest",
        "message": "asset ahu-c2 stale",
        "asset": "ahu-c2",
        "count": 3,
        "site": "Larkspur Yard",
    }


def test_json_exception_is_a_string_field() -> None:
    try:
        raise KeyError("block-c")
    except KeyError:
        rec = record("lookup failed", (), level=logging.ERROR)
        rec.exc_info = sys.exc_info()
    entry = strict_json(JsonFormatter().format(rec))
    assert isinstance(entry["exc"], str)
    assert entry["exc"].startswith("Traceback (most recent call last):")
    assert entry["exc"].endswith("KeyError: 'block-c'")


def test_json_values_it_cannot_hold_become_text() -> None:
    rec = record(
        ratio=float("nan"),
        limits={"low": float("-inf"), "high": 2.5},
        assets=("ahu-c2", "vav-3-14"),
        when=datetime(2026, 12, 2, tzinfo=UTC),
    )
    entry = strict_json(JsonFormatter().format(rec))
    assert entry["ratio"] == "nan"
    assert entry["limits"] == {"low": "-inf", "high": 2.5}
    assert entry["assets"] == ["ahu-c2", "vav-3-14"]
    assert entry["when"] == "2026-12-02 00:00:00+00:00"


def test_json_extra_cannot_overwrite_the_fixed_keys() -> None:
    entry = strict_json(JsonFormatter().format(record(level_="x", ts="forged", logger="forged")))
    assert entry["ts"] == "2026-12-02T05:20:48.123Z"
    assert entry["logger"] == "arxwatch.daemon.ingest"
    assert entry["level_"] == "x"


# --- configure_logging --------------------------------------------------------------------


def test_configure_json_end_to_end(root) -> None:
    stream = io.StringIO()
    configure_logging("info", "json", stream)
    log = logging.getLogger("arxwatch.daemon.ingest")
    log.debug("not shown")
    log.info("connected to %s", "broker.larkspur.example", extra={"attempt": 2})
    lines = stream.getvalue().splitlines()
    assert len(lines) == 1
    entry = strict_json(lines[0])
    assert entry["message"] == "connected to broker.larkspur.example"
    assert entry["level"] == "INFO"
    assert entry["attempt"] == 2
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z", str(entry["ts"]))


def test_configure_text_end_to_end(root) -> None:
    stream = io.StringIO()
    configure_logging("DEBUG", "text", stream)
    logging.getLogger("arxwatch.daemon.store").debug("checkpoint %d written", 7)
    (line,) = stream.getvalue().splitlines()
    stamp, rest = line.split(" ", 1)
    assert re.fullmatch(r"\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z", stamp)
    assert rest == "DEBUG arxwatch.daemon.store: checkpoint 7 written"


def test_configure_twice_replaces_its_own_handler_only(root) -> None:
    others = list(root.handlers)
    first, second = io.StringIO(), io.StringIO()
    configure_logging("info", "text", first)
    configure_logging("warning", "json", second)
    assert [h for h in root.handlers if h not in others] == [root.handlers[-1]]
    assert all(h in root.handlers for h in others)
    logging.getLogger("arxwatch.daemon.cli").warning("once")
    assert first.getvalue() == ""
    assert strict_json(second.getvalue())["message"] == "once"
    assert root.level == logging.WARNING


def test_configure_rate_limits_repeated_warnings(root) -> None:
    stream = io.StringIO()
    configure_logging("info", "json", stream, rate_limit_s=3600.0)
    log = logging.getLogger("arxwatch.daemon.ingest")
    for asset in ("ahu-c2", "vav-3-14", "vav-3-15"):
        log.warning("asset %s went stale", asset)
    for n in range(3):
        log.info("sample %d", n)  # below warning: never limited
    messages = [strict_json(line)["message"] for line in stream.getvalue().splitlines()]
    assert messages == ["asset ahu-c2 went stale", "sample 0", "sample 1", "sample 2"]


@pytest.mark.parametrize(
    ("level", "fmt", "rate", "message"),
    [
        ("verbose", "text", 60.0, r"level must be one of \['debug', 'error', 'info', 'warning'\]"),
        ("info", "xml", 60.0, "fmt must be 'text' or 'json', got 'xml'"),
        ("info", "text", 0.0, "interval_s must be > 0, got 0.0"),
    ],
)
def test_configure_refuses_bad_arguments(root, level, fmt, rate, message) -> None:
    before = list(root.handlers)
    with pytest.raises(ValueError, match=message):
        configure_logging(level, fmt, io.StringIO(), rate_limit_s=rate)
    assert root.handlers == before


# --- RateLimitFilter ----------------------------------------------------------------------


class FakeClock:
    """A clock that moves only when the test sets ``now``."""

    def __init__(self) -> None:
        self.now = 1000.0

    def __call__(self) -> float:
        """Return the current fake time."""
        return self.now


def test_rate_limit_once_per_interval_then_reports_suppressed() -> None:
    clock = FakeClock()
    limit = RateLimitFilter(60.0, clock=clock)
    assert limit.filter(record())
    clock.now += 1.0
    assert [limit.filter(record("asset %s stale", (a,))) for a in ("b", "c", "d", "e")] == [
        False
    ] * 4
    clock.now += 58.9  # 59.9 s after the first: still inside the window
    assert not limit.filter(record())
    clock.now += 0.1  # 60 s: the window is over
    passed = record()
    assert limit.filter(passed)
    assert passed.suppressed == 5
    clock.now += 60.0
    quiet = record()
    assert limit.filter(quiet)
    assert not hasattr(quiet, "suppressed")  # nothing held back in that window


def test_rate_limit_keys_by_logger_level_and_template() -> None:
    limit = RateLimitFilter(60.0, clock=FakeClock())
    assert limit.filter(record("asset %s stale"))
    assert limit.filter(record("asset %s stuck"))
    assert limit.filter(record("asset %s stale", name="arxwatch.daemon.align"))
    assert limit.filter(record("asset %s stale", level=logging.ERROR))
    assert not limit.filter(record("asset %s stale", ("other",)))


def test_rate_limit_passes_records_below_its_level() -> None:
    limit = RateLimitFilter(60.0, clock=FakeClock())
    assert all(limit.filter(record(level=logging.INFO)) for _ in range(5))
    strict = RateLimitFilter(60.0, clock=FakeClock(), min_level=logging.DEBUG)
    assert strict.filter(record(level=logging.DEBUG))
    assert not strict.filter(record(level=logging.DEBUG))


def test_rate_limit_memory_is_bounded() -> None:
    limit = RateLimitFilter(60.0, clock=FakeClock(), max_keys=2)
    assert limit.filter(record("first %s"))
    assert limit.filter(record("second %s"))
    assert limit.filter(record("third %s"))  # forgets "first", the oldest window
    assert limit.filter(record("first %s"))  # so it passes again (and forgets "second")
    assert not limit.filter(record("third %s"))


def test_suppressed_count_appears_in_json_output() -> None:
    clock = FakeClock()
    stream = io.StringIO()
    handler = logging.StreamHandler(stream)
    handler.setFormatter(JsonFormatter())
    handler.addFilter(RateLimitFilter(10.0, clock=clock))
    for _ in range(4):
        handler.handle(record())
    clock.now += 10.0
    handler.handle(record())
    lines = [strict_json(line) for line in stream.getvalue().splitlines()]
    assert [line.get("suppressed") for line in lines] == [None, 3]


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"interval_s": -1.0}, "interval_s must be > 0, got -1.0"),
        ({"interval_s": float("nan")}, "interval_s must be > 0, got nan"),
        ({"max_keys": 0}, "max_keys must be >= 1, got 0"),
    ],
)
def test_rate_limit_refuses_bad_settings(kwargs, message) -> None:
    with pytest.raises(ValueError, match=message):
        RateLimitFilter(**kwargs)
