"""Sinks: where rendered messages go. Thin adapters around pure helpers.

* ``WebhookSink``: HTTP POST of a JSON body built from a YAML template (chat incoming
  webhooks); the URL comes from an environment variable and is never logged in full.
* ``CloudEventsSink``: CloudEvents 1.0, structured content mode, JSON, over HTTP POST.
* ``JsonlSink``: one JSON object per line, appended, rotated by size or by day.
* ``RedisStreamSink``: XADD of the rendered message to a stream for dashboards.

Every send carries the message's idempotency key (``Idempotency-Key`` header for HTTP),
the same on every retry. A failed send raises ``SinkSendError`` saying whether a retry is
worth it (timeouts, connection errors, 408, 429 with its Retry-After, 5xx) or not.
"""

from __future__ import annotations

import json
import os
import string
import urllib.error
import urllib.request
from collections.abc import Callable
from dataclasses import dataclass, field
from datetime import UTC, datetime
from email.utils import parsedate_to_datetime
from pathlib import Path
from typing import Any, Protocol
from urllib.parse import quote, urlsplit

from .config import SinkTarget, SinkUpdates
from .errors import SinkError, SinkSendError

__all__ = ["Outgoing", "Sent", "Sink", "WebhookSink", "CloudEventsSink", "JsonlSink", "RedisStreamSink",
           "build_sink", "redact_url", "parse_retry_after", "classify_status", "render_body", "cloud_event",
           "resolve_url", "answer_field", "update_url"]

USER_AGENT = "alerter-sinks/1"


@dataclass(frozen=True)
class Outgoing:
    """One message to deliver: its key (same on every retry), text and the record behind it."""

    key: str
    entry_type: str  # "incident", "alert", "fold", "digest", "test"
    hour: str
    title: str
    text: str
    thread: str = ""
    revision: int = 0
    state: str = ""
    subject: str = ""
    record: dict[str, Any] = field(default_factory=dict)
    url_env: str | None = None  # a route's webhook variable, else the sink's
    edit_of: str | None = None  # the endpoint's id of the thread's first message: edit/reply under it


@dataclass(frozen=True)
class Sent:
    """What the endpoint answered to a successful send."""

    status: int
    detail: str = ""
    message_id: str | None = None  # from the answer's ``updates.id_field``, when configured


class Sink(Protocol):
    name: str

    def send(self, msg: Outgoing) -> Sent: ...


# --- pure helpers ----------------------------------------------------------------------------

def redact_url(url: str) -> str:
    """Scheme and host only: webhook paths and queries carry secrets.

    >>> redact_url("https://hooks.example/services/T000/SECRET?token=x")
    'https://hooks.example/***'
    """
    parts = urlsplit(url)
    host = parts.hostname or "?"
    port = f":{parts.port}" if parts.port else ""
    return f"{parts.scheme or '?'}://{host}{port}/***"


def parse_retry_after(value: str | None, now: datetime) -> float | None:
    """Seconds to wait from a Retry-After header: delta-seconds or an HTTP-date.

    >>> now = datetime(2026, 11, 20, 10, 0, tzinfo=UTC)
    >>> [parse_retry_after(v, now) for v in ("3", " 0 ", "Fri, 20 Nov 2026 10:00:30 GMT", "soon", None, "-4")]
    [3.0, 0.0, 30.0, None, None, None]
    """
    if value is None:
        return None
    text = value.strip()
    if text.isdigit():
        return float(text)
    try:
        when = parsedate_to_datetime(text)
    except (TypeError, ValueError, IndexError):
        return None
    if when is None:
        return None
    return max(0.0, (when - now).total_seconds())


def classify_status(status: int) -> tuple[bool, bool]:
    """(delivered, worth retrying) for an HTTP status.

    >>> [classify_status(s) for s in (200, 204, 400, 404)]
    [(True, False), (True, False), (False, False), (False, False)]
    >>> [classify_status(s) for s in (408, 429, 500, 503)]
    [(False, True), (False, True), (False, True), (False, True)]
    """
    if 200 <= status < 300:
        return True, False
    return False, status in (408, 425, 429) or status >= 500


def render_body(template: str, values: dict[str, Any]) -> bytes:
    """The webhook body: ``$name`` in the template replaced by the JSON form of the value.

    Values are inserted as JSON literals (strings quoted and escaped), so message text can
    never break out of its place in the body.

    >>> render_body('{"text": $text, "n": $revision}', {"text": 'a "b"\\n', "revision": 2})
    b'{"text": "a \\\\"b\\\\"\\\\n", "n": 2}'
    """
    mapping = {k: json.dumps(v, ensure_ascii=False) for k, v in values.items()}
    try:
        body = string.Template(template).substitute(mapping)
        json.loads(body)
    except (KeyError, ValueError) as exc:
        raise SinkError(f"body_template {template!r} does not give JSON ({exc}); use $text, $title, $thread, "
                        "$revision, $state, $key, $hour as whole JSON values, e.g. '{\"text\": $text}'") from exc
    return body.encode("utf-8")


def cloud_event(msg: Outgoing, source: str) -> dict[str, Any]:
    """A CloudEvents 1.0 event (structured mode) for one message; ``id`` is the idempotency key."""
    event: dict[str, Any] = {
        "specversion": "1.0",
        "id": msg.key,
        "source": source,
        "type": f"alerter.{msg.entry_type}.v1",
        "datacontenttype": "application/json",
        "data": {"title": msg.title, "text": msg.text, "state": msg.state, "revision": msg.revision,
                 "record": msg.record},
    }
    if msg.subject:
        event["subject"] = msg.subject
    if msg.hour:
        event["time"] = msg.hour
    return event


def resolve_url(env_name: str, sink: str) -> str:
    """The URL held by an environment variable; a clear error naming the variable if unset."""
    url = os.environ.get(env_name, "").strip()
    if not url:
        raise SinkError(f"sink {sink!r}: environment variable {env_name} is not set or empty; export it with "
                        "the endpoint URL (the URL is a secret and never goes in the YAML)")
    if not url.startswith(("http://", "https://")):
        raise SinkError(f"sink {sink!r}: {env_name} holds {redact_url(url)}, not an http(s) URL; "
                        "set it to https://...")
    return url


def answer_field(answer: str, path: str) -> str | None:
    """The value at a dotted ``path`` of a JSON answer, as text; None when absent or not JSON.

    >>> answer_field('{"message": {"id": 42}}', "message.id"), answer_field("ok", "id")
    ('42', None)
    """
    try:
        value: Any = json.loads(answer)
    except ValueError:
        return None
    for part in path.split("."):
        if not isinstance(value, dict) or part not in value:
            return None
        value = value[part]
    return None if value is None or isinstance(value, (dict, list)) else str(value)


def update_url(template: str, url: str, message_id: str) -> str:
    """The edit/reply URL: ``$url`` is the sink's URL, ``$message_id`` the id, percent-encoded.

    >>> update_url("$url/messages/$message_id", "http://h/hook", "a/b c")
    'http://h/hook/messages/a%2Fb%20c'
    """
    return string.Template(template).safe_substitute(url=url, message_id=quote(message_id, safe=""))


# --- HTTP ------------------------------------------------------------------------------------

ANSWER_LIMIT = 65536  # bytes of an answer read (enough for a message id; a huge answer is not kept)


def _post(url: str, body: bytes, headers: dict[str, str], timeout: float, sink: str,
          now: Callable[[], datetime], method: str = "POST") -> Sent:
    """One request; 2xx returns, anything else raises SinkSendError (retryable or not)."""
    where = redact_url(url)
    request = urllib.request.Request(url, data=body, method=method, headers={"User-Agent": USER_AGENT, **headers})
    try:
        with urllib.request.urlopen(request, timeout=timeout) as response:  # noqa: S310 - http(s) checked
            return Sent(response.status, response.read(ANSWER_LIMIT).decode("utf-8", "replace"))
    except urllib.error.HTTPError as exc:
        detail = exc.read(200).decode("utf-8", "replace") if exc.fp else ""
        _, retry = classify_status(exc.code)
        wait = parse_retry_after(exc.headers.get("Retry-After"), now()) if exc.code == 429 else None
        raise SinkSendError(f"sink {sink!r}: {method} {where} answered {exc.code} {detail[:80]!r}",
                            retryable=retry, status=exc.code, retry_after=wait) from None
    except (urllib.error.URLError, TimeoutError, ConnectionError, OSError) as exc:
        reason = getattr(exc, "reason", exc)
        raise SinkSendError(f"sink {sink!r}: {method} {where} failed: {reason}; check the endpoint is up and "
                            f"reachable, and timeout_seconds ({timeout})", retryable=True) from None


@dataclass
class _HttpSink:
    """What the HTTP sinks share: the URL from the environment, the timeout, the clock, one POST."""

    name: str
    url_env: str
    timeout: float = 10.0
    now: Callable[[], datetime] = lambda: datetime.now(UTC)

    def _url(self, msg: Outgoing) -> str:
        return resolve_url(msg.url_env or self.url_env, self.name)

    def _request(self, url: str, body: bytes, headers: dict[str, str], method: str = "POST") -> Sent:
        return _post(url, body, headers, self.timeout, self.name, self.now, method)


@dataclass
class WebhookSink(_HttpSink):
    """Chat incoming webhook: JSON body from ``body_template``; route URLs override the default.

    With ``updates`` set, the first post's answer gives the message id (``updates.id_field``)
    and an update that carries it (``Outgoing.edit_of``) goes to ``updates.url_template``
    with ``updates.method``: an edit of that message or a reply under it.
    """

    template: str = '{"text": $text}'
    updates: SinkUpdates | None = None

    def send(self, msg: Outgoing) -> Sent:
        url, method, template = self._url(msg), "POST", self.template
        if msg.edit_of and self.updates is not None:
            url, method = update_url(self.updates.url_template, url, msg.edit_of), self.updates.method
            template = self.updates.body_template or self.template
        body = render_body(template, {"text": msg.text, "title": msg.title, "thread": msg.thread,
                                      "revision": msg.revision, "state": msg.state, "key": msg.key,
                                      "hour": msg.hour, "message_id": msg.edit_of or ""})
        headers = {"Content-Type": "application/json; charset=utf-8", "Idempotency-Key": msg.key,
                   "X-Alerter-Thread": msg.thread, "X-Alerter-Revision": str(msg.revision)}
        sent = self._request(url, body, headers, method)
        found = answer_field(sent.detail, self.updates.id_field) if self.updates and not msg.edit_of else None
        return Sent(sent.status, sent.detail[:200], found)


@dataclass
class CloudEventsSink(_HttpSink):
    """CloudEvents 1.0 structured mode: the whole event is the JSON body."""

    source: str = "/alerter"

    def send(self, msg: Outgoing) -> Sent:
        body = json.dumps(cloud_event(msg, self.source), ensure_ascii=False, sort_keys=True).encode("utf-8")
        headers = {"Content-Type": "application/cloudevents+json; charset=utf-8", "Idempotency-Key": msg.key}
        sent = self._request(self._url(msg), body, headers)
        return Sent(sent.status, sent.detail[:200])


# --- files and streams -----------------------------------------------------------------------

@dataclass
class JsonlSink:
    """Append one JSON line per message; rotate when the file would pass ``rotate_bytes``
    or when the UTC day (of ``now``, the injected clock) changed since the last line.

    The file's modification time is set from ``now`` on every append, so the day it was last
    written survives a restart and rotation never depends on the machine's clock alone."""

    name: str
    path: Path
    rotate_bytes: int
    rotate_daily: bool = True
    now: Callable[[], datetime] = lambda: datetime.now(UTC)

    def _rotate_if_due(self, incoming: int) -> None:
        if not self.path.exists():
            return
        stat, now = self.path.stat(), self.now().astimezone(UTC)  # days are UTC days, whatever the clock's zone
        started = datetime.fromtimestamp(stat.st_mtime, UTC).date()
        too_big = stat.st_size + incoming > self.rotate_bytes and stat.st_size > 0
        new_day = self.rotate_daily and started != now.date()
        if too_big or new_day:
            stamp = now.strftime("%Y%m%dT%H%M%S")
            n = 0
            while (target := self.path.with_name(f"{self.path.name}.{stamp}.{n}")).exists():
                n += 1
            os.replace(self.path, target)

    def send(self, msg: Outgoing) -> Sent:
        line = json.dumps({"key": msg.key, "type": msg.entry_type, "hour": msg.hour, "title": msg.title,
                           "text": msg.text, "thread": msg.thread, "revision": msg.revision,
                           "record": msg.record}, ensure_ascii=False, sort_keys=True) + "\n"
        data = line.encode("utf-8")
        try:
            self.path.parent.mkdir(parents=True, exist_ok=True)
            self._rotate_if_due(len(data))
            with self.path.open("ab") as handle:
                handle.write(data)
                handle.flush()
                os.fsync(handle.fileno())
            stamp = self.now().timestamp()  # the file's time follows the sink's clock: rotation is by its day
            os.utime(self.path, (stamp, stamp))
        except OSError as exc:
            raise SinkSendError(f"sink {self.name!r}: cannot append to {self.path}: {exc.strerror}; check the "
                                "folder exists and is writable", retryable=True) from None
        return Sent(0, str(self.path))


@dataclass
class RedisStreamSink:
    """XADD the rendered message to a stream (approximate MAXLEN) for dashboards."""

    name: str
    store: Any
    stream: str
    maxlen: int

    def send(self, msg: Outgoing) -> Sent:
        from .errors import StoreError

        fields = {"key": msg.key, "type": msg.entry_type, "hour": msg.hour, "title": msg.title,
                  "text": msg.text, "thread": msg.thread, "revision": str(msg.revision), "state": msg.state}
        try:
            eid = self.store.add_entry(self.stream, fields, self.maxlen)
        except StoreError as exc:
            raise SinkSendError(f"sink {self.name!r}: {exc}", retryable=True) from None
        return Sent(0, eid.decode() if isinstance(eid, bytes) else str(eid))


def build_sink(target: SinkTarget, store: Any = None, now: Callable[[], datetime] | None = None) -> Sink:
    """The sink object for one configured target."""
    clock = now or (lambda: datetime.now(UTC))
    if target.kind == "webhook":
        return WebhookSink(target.name, str(target.url_env), target.timeout_seconds, clock,
                           template=target.body_template, updates=target.updates)
    if target.kind == "cloudevents":
        return CloudEventsSink(target.name, str(target.url_env), target.timeout_seconds, clock,
                               source=target.source)
    if target.kind == "jsonl":
        return JsonlSink(target.name, Path(str(target.path)), target.rotate_bytes, target.rotate_daily, clock)
    if store is None:
        raise SinkError(f"sink {target.name!r}: a redis_stream sink needs a Redis connection")
    return RedisStreamSink(target.name, store, str(target.stream), target.stream_maxlen)
