"""Log set-up for the ``arxwatch`` command: text or JSON lines, rate-limited warnings.

Only ``cli.main`` calls :func:`configure_logging`; every other module just
uses ``logging.getLogger(__name__)`` with %-style arguments. Two formats:

``text``
    ``2026-12-02T05:20:48.123Z INFO arxwatch.daemon.ingest: message``, then
    any extra fields as ``key=value`` and, after an exception, its traceback
    on the following lines.
``json``
    One object per line: ``{"ts": ..., "level": ..., "logger": ...,
    "message": ..., **extra}``, with an exception as the string field
    ``"exc"`` (and a stack, if asked for, as ``"stack"``).

Times are UTC with milliseconds. Extra fields are those passed with
``logger.warning(..., extra={"asset": "ahu-c2"})``; a field named like one of
the JSON keys above is dropped rather than allowed to overwrite it. Values
that JSON cannot hold are written with ``str`` (non-finite floats included,
so every line stays valid JSON).

:class:`RateLimitFilter` lets a repeated warning through once per interval
per (logger, level, message template) and tells, on the next one it lets
through, how many it held back, as the extra field ``suppressed``.

Nothing here logs configuration values, so no secret can leak from here.
"""

from __future__ import annotations

import json
import logging
import math
import threading
import time
from collections import OrderedDict
from collections.abc import Callable
from typing import Final, Literal, TextIO

__all__ = ["JsonFormatter", "RateLimitFilter", "TextFormatter", "configure_logging"]

_LEVELS: Final = {
    "debug": logging.DEBUG,
    "info": logging.INFO,
    "warning": logging.WARNING,
    "error": logging.ERROR,
}
#: Attributes every LogRecord has; anything else on a record came in as ``extra``.
_RECORD_ATTRIBUTES: Final = frozenset(
    vars(logging.LogRecord("", logging.INFO, "", 0, "", (), None))
) | {"message", "asctime", "taskName"}
_JSON_KEYS: Final = frozenset({"ts", "level", "logger", "message", "exc", "stack"})


def _extras(record: logging.LogRecord) -> dict[str, object]:
    return {k: v for k, v in vars(record).items() if k not in _RECORD_ATTRIBUTES}


def _timestamp(record: logging.LogRecord) -> str:
    stamp = time.strftime("%Y-%m-%dT%H:%M:%S", time.gmtime(record.created))
    return f"{stamp}.{int(record.msecs):03d}Z"


def _plain(value: object) -> object:
    """``value`` as something ``json.dumps`` writes as valid JSON."""
    if value is None or isinstance(value, bool | int | str):
        return value
    if isinstance(value, float):
        return value if math.isfinite(value) else str(value)
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_plain(v) for v in value]
    return str(value)


class TextFormatter(logging.Formatter):
    """One line per record: UTC time, level, logger, message, ``key=value`` extras."""

    def format(self, record: logging.LogRecord) -> str:
        """Render ``record``; a traceback, if any, follows on the next lines."""
        line = f"{_timestamp(record)} {record.levelname} {record.name}: {record.getMessage()}"
        for key, value in _extras(record).items():
            text = str(value)
            if not text or any(c.isspace() or c in '"=' for c in text):
                text = json.dumps(text)
            line += f" {key}={text}"
        if record.exc_info:
            line += "\n" + self.formatException(record.exc_info)
        if record.stack_info:
            line += "\n" + self.formatStack(record.stack_info)
        return line


class JsonFormatter(logging.Formatter):
    """One JSON object per record (JSON Lines)."""

    def format(self, record: logging.LogRecord) -> str:
        """Render ``record`` as one line of JSON, without embedded newlines."""
        entry: dict[str, object] = {
            "ts": _timestamp(record),
            "level": record.levelname,
            "logger": record.name,
            "message": record.getMessage(),
        }
        for key, value in _extras(record).items():
            if key not in _JSON_KEYS:
                entry[key] = _plain(value)
        if record.exc_info:
            entry["exc"] = self.formatException(record.exc_info)
        if record.stack_info:
            entry["stack"] = self.formatStack(record.stack_info)
        return json.dumps(entry, ensure_ascii=False, default=str)


class RateLimitFilter(logging.Filter):
    """Let a repeated record through once per interval; count the rest.

    Records at or above ``min_level`` are keyed by (logger name, level,
    unformatted message template), so ``"asset %s stale"`` for a thousand
    assets counts as one message. The first record of a key passes and opens
    a window of ``interval_s``; later records of that key within the window
    are dropped and counted. The first record after the window passes with
    the extra attribute ``suppressed`` set to that count (when non-zero) and
    opens a new window. Records below ``min_level`` always pass.

    Parameters
    ----------
    interval_s : float, default 60.0
        Window length in seconds, > 0.
    clock : callable, default time.monotonic
        Returns the current time in seconds; injectable for tests.
    min_level : int, default logging.WARNING
        Lowest level that is rate-limited.
    max_keys : int, default 1024
        Most keys remembered; beyond it the key whose window opened first is
        forgotten (with its count), so memory stays bounded even when
        callers format messages themselves.

    Raises
    ------
    ValueError
        If ``interval_s`` is not positive or ``max_keys`` < 1.

    Examples
    --------
    >>> now = [0.0]
    >>> limit = RateLimitFilter(10.0, clock=lambda: now[0])
    >>> def record():
    ...     return logging.LogRecord("x", logging.WARNING, "", 0, "stale %s", ("a",), None)
    >>> [limit.filter(record()) for _ in range(3)]
    [True, False, False]
    >>> now[0] = 10.0
    >>> passed = record()
    >>> limit.filter(passed), passed.suppressed
    (True, 2)
    """

    def __init__(
        self,
        interval_s: float = 60.0,
        *,
        clock: Callable[[], float] = time.monotonic,
        min_level: int = logging.WARNING,
        max_keys: int = 1024,
    ) -> None:
        super().__init__()
        if not interval_s > 0.0:
            raise ValueError(f"interval_s must be > 0, got {interval_s!r}")
        if max_keys < 1:
            raise ValueError(f"max_keys must be >= 1, got {max_keys!r}")
        self.interval_s = float(interval_s)
        self.min_level = min_level
        self.max_keys = max_keys
        self._clock = clock
        self._lock = threading.Lock()
        # key -> [window start, suppressed count]; ordered by window start
        self._windows: OrderedDict[tuple[str, int, str], list[float]] = OrderedDict()

    def filter(self, record: logging.LogRecord) -> bool:
        """Return whether ``record`` is let through (and annotate it if so)."""
        if record.levelno < self.min_level:
            return True
        key = (record.name, record.levelno, str(record.msg))
        now = self._clock()
        with self._lock:
            window = self._windows.get(key)
            if window is not None and now - window[0] < self.interval_s:
                window[1] += 1
                return False
            if window is not None and window[1] > 0:
                record.__dict__["suppressed"] = int(window[1])
            self._windows[key] = [now, 0]
            self._windows.move_to_end(key)
            while len(self._windows) > self.max_keys:
                self._windows.popitem(last=False)
        return True


class _Handler(logging.StreamHandler[TextIO]):
    """The handler :func:`configure_logging` installs (so a second call replaces it)."""


def configure_logging(
    level: str,
    fmt: Literal["text", "json"],
    stream: TextIO,
    *,
    rate_limit_s: float = 60.0,
) -> None:
    """Send all log records at or above ``level`` to ``stream``, one line each.

    Sets the root logger's level and installs one handler with the chosen
    formatter and a :class:`RateLimitFilter` for warnings and errors. A
    handler installed by an earlier call is replaced; other handlers are left
    alone.

    Parameters
    ----------
    level : {"debug", "info", "warning", "error"}
        Threshold (case-insensitive).
    fmt : {"text", "json"}
        Line format (see the module docstring).
    stream : TextIO
        Where lines go, normally ``sys.stderr`` (journald adds its own time
        and priority to what a service writes there).
    rate_limit_s : float, default 60.0
        Interval of the rate limit for repeated warnings and errors.

    Raises
    ------
    ValueError
        If ``level`` or ``fmt`` is not one of the names above, or
        ``rate_limit_s`` is not positive.
    """
    threshold = _LEVELS.get(level.lower())
    if threshold is None:
        raise ValueError(f"level must be one of {sorted(_LEVELS)}, got {level!r}")
    formatters: dict[str, type[logging.Formatter]] = {"text": TextFormatter, "json": JsonFormatter}
    if fmt not in formatters:
        raise ValueError(f"fmt must be 'text' or 'json', got {fmt!r}")
    handler = _Handler(stream)
    handler.setFormatter(formatters[fmt]())
    handler.addFilter(RateLimitFilter(rate_limit_s))
    root = logging.getLogger()
    for old in [h for h in root.handlers if isinstance(h, _Handler)]:
        root.removeHandler(old)
        old.close()
    root.addHandler(handler)
    root.setLevel(threshold)
