"""The project's one exception hierarchy.

Every error a user can meet says what failed, the bad value and how to fix it. Outside
exceptions (JSON, OS, Redis, HTTP) are translated at the boundary with ``raise ... from``.

::

    AlerterError                  base: the CLI maps it to a message and exit code 2
    ├── ConfigError               YAML config invalid: one line per problem (file, line, key)
    ├── RecordingError            a recording line is malformed (file, line number, reason)
    ├── LabelsError               a labels file is malformed
    ├── UnknownNodeError          a node id that the stream never mentioned
    ├── HourRangeError            an hour outside the recording's span
    ├── BadEntryError             a stream entry that cannot be decoded (goes to dead letters)
    ├── CheckpointError           a checkpoint that cannot be read back (wrong version, corrupt)
    ├── StoreError                Redis failed: the command, the server (redacted), the fix
    │   ├── StoreUnavailableError Redis unreachable (connection refused, timeout, TLS)
    │   └── ServerSetupError      no embedded or local redis-server could be started
    └── SinkError                 a sink cannot be set up or refused a message for good
        └── SinkSendError         one send failed (status, redacted target); ``retry`` says if worth retrying
"""

from __future__ import annotations


class AlerterError(Exception):
    """Base of every error the tool raises on purpose; its text is meant for people."""

    exit_code = 2


class ConfigError(AlerterError):
    """The YAML config is invalid; ``problems`` holds one human line per problem."""

    def __init__(self, path: str, problems: list[str]) -> None:
        self.path = path
        self.problems = problems
        lines = "\n".join(f"  - {p}" for p in problems)
        super().__init__(f"invalid config {path}: {len(problems)} problem(s)\n{lines}")


class RecordingError(AlerterError):
    """A recording could not be read: names the file and line."""

    def __init__(self, path: str, line: int | None, reason: str) -> None:
        self.path = path
        self.line = line
        self.reason = reason
        where = f"{path}:{line}" if line is not None else path
        super().__init__(f"{where}: {reason}")


class LabelsError(AlerterError):
    """A labels file could not be read or does not follow alerter-labels/1."""


class UnknownNodeError(AlerterError):
    """A node id that is not in the stream."""


class HourRangeError(AlerterError):
    """An hour outside the span of the recording."""


class BadEntryError(AlerterError):
    """A stream entry that cannot be decoded; ``reason`` says what is wrong with it."""

    def __init__(self, reason: str) -> None:
        self.reason = reason
        super().__init__(reason)


class CheckpointError(AlerterError):
    """A stored checkpoint cannot be used (written by another version, or corrupt)."""


class StoreError(AlerterError):
    """A Redis command failed; the message names the command, the server and the fix."""


class StoreUnavailableError(StoreError):
    """The Redis server cannot be reached (refused, timed out, TLS or auth failure)."""


class ServerSetupError(StoreError):
    """No Redis server could be started or found; the message says how to get one."""


class SinkError(AlerterError):
    """A sink cannot be used: a missing URL variable, a bad path or template; says the fix."""


class SinkSendError(SinkError):
    """One send failed. ``retryable`` for timeouts, 5xx and 429; ``retry_after`` from a 429."""

    def __init__(self, message: str, *, retryable: bool, status: int | None = None,
                 retry_after: float | None = None) -> None:
        self.retryable = retryable
        self.status = status
        self.retry_after = retry_after
        super().__init__(message)
