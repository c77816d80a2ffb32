"""systemd service notifications: readiness, status, stopping and watchdog pings.

Under ``Type=notify`` systemd passes the address of a datagram socket in
``NOTIFY_SOCKET`` and waits for ``READY=1``; with ``WatchdogSec=`` it passes
``WATCHDOG_USEC`` (and ``WATCHDOG_PID``) and restarts the service when
``WATCHDOG=1`` pings stop arriving. :class:`Notifier` speaks that protocol
with the standard library alone. The environment is passed in
(:meth:`Notifier.from_environ`), never read at import; without
``NOTIFY_SOCKET`` (not run by systemd) every method does nothing.

Sending never raises: systemd may already be gone during shutdown, and a
lost status line must not take the daemon down. Failures are logged at
debug level.

References
----------
systemd manual pages: sd_notify(3) (the ``NOTIFY_SOCKET`` address, a path or
an abstract name after ``@``, and the ``READY=1``, ``STOPPING=1``,
``STATUS=...``, ``WATCHDOG=1`` assignments), sd_watchdog_enabled(3)
(``WATCHDOG_USEC``, ``WATCHDOG_PID``) and systemd.service(5) (``Type=notify``,
``WatchdogSec=``; pinging at half the interval is the recommendation there).
"""

from __future__ import annotations

import logging
import os
import socket
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Final

__all__ = ["Notifier"]

_log = logging.getLogger(__name__)

#: Longest wait for the notification socket to accept a datagram; a worker
#: that pings the watchdog must not hang on a congested socket.
_SEND_TIMEOUT_S: Final = 1.0


@dataclass(frozen=True)
class Notifier:
    r"""Sender of sd_notify datagrams.

    Parameters
    ----------
    address : str or None
        AF_UNIX datagram address: a file system path, or ``"\0name"`` (a NUL
        byte, then the name) for an abstract socket; ``None`` makes every
        method a no-op.
    watchdog_usec : int or None
        Watchdog timeout in microseconds for this process, or ``None`` when
        the watchdog is off.
    """

    address: str | None = None
    watchdog_usec: int | None = None

    @classmethod
    def from_environ(cls, environ: Mapping[str, str], *, pid: int | None = None) -> Notifier:
        """Build a notifier from the service environment.

        Parameters
        ----------
        environ : Mapping[str, str]
            The process environment, e.g. ``os.environ``.
        pid : int, optional
            This process's id, compared with ``WATCHDOG_PID``; default
            :func:`os.getpid`.

        Returns
        -------
        Notifier
            Sending to ``NOTIFY_SOCKET`` when it is an absolute path or
            ``@name``; a no-op notifier when it is unset, empty or of a
            form not supported here (logged as a warning). The watchdog is on
            when ``WATCHDOG_USEC`` is a positive integer and ``WATCHDOG_PID``
            is unset or names this process.
        """
        raw = environ.get("NOTIFY_SOCKET", "")
        address: str | None = None
        if raw.startswith("/"):
            address = raw
        elif raw.startswith("@") and len(raw) > 1:
            address = "\0" + raw[1:]
        elif raw:
            _log.warning(
                "NOTIFY_SOCKET=%r is not an absolute path or @name; systemd notifications off",
                raw,
            )
        return cls(
            address=address,
            watchdog_usec=_watchdog_usec(environ, os.getpid() if pid is None else pid),
        )

    @property
    def watchdog_interval_s(self) -> float | None:
        """Seconds between watchdog pings: half the watchdog timeout, or ``None`` if off."""
        return None if self.watchdog_usec is None else self.watchdog_usec / 2_000_000.0

    def ready(self) -> None:
        """Tell systemd that start-up is complete (``READY=1``)."""
        self._send("READY=1")

    def stopping(self) -> None:
        """Tell systemd that the service is shutting down (``STOPPING=1``)."""
        self._send("STOPPING=1")

    def status(self, text: str) -> None:
        """Set the one-line status ``systemctl status`` shows (``STATUS=...``).

        Parameters
        ----------
        text : str
            Status text; line breaks become spaces (a newline would end the
            assignment).
        """
        self._send("STATUS=" + " ".join(text.splitlines()))

    def watchdog(self) -> None:
        """Keep the watchdog from firing (``WATCHDOG=1``)."""
        self._send("WATCHDOG=1")

    def _send(self, message: str) -> None:
        if self.address is None:
            return
        try:
            with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM | socket.SOCK_CLOEXEC) as sock:
                sock.settimeout(_SEND_TIMEOUT_S)
                sock.sendto(message.encode(), self.address)
        except OSError as err:
            _log.debug("sd_notify %s to %r failed: %s", message, self.address, err)


def _watchdog_usec(environ: Mapping[str, str], pid: int) -> int | None:
    raw_usec = environ.get("WATCHDOG_USEC")
    if raw_usec is None:
        return None
    raw_pid = environ.get("WATCHDOG_PID")
    if raw_pid is not None:
        watchdog_pid = _unsigned(raw_pid)
        if watchdog_pid is None:
            _log.warning("WATCHDOG_PID=%r is not a process id; watchdog off", raw_pid)
            return None
        if watchdog_pid != pid:  # meant for another process, e.g. our parent
            return None
    usec = _unsigned(raw_usec)
    if not usec:
        _log.warning("WATCHDOG_USEC=%r is not a positive integer; watchdog off", raw_usec)
        return None
    return usec


def _unsigned(text: str) -> int | None:
    """``text`` as a decimal integer >= 0 (ASCII digits only), else ``None``."""
    return int(text) if text.isascii() and text.isdigit() else None
