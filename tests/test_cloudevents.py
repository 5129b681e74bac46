"""CloudEvents 1.0 structured mode: required attributes, schema check, id stable across retries."""

from __future__ import annotations

import json
import re
from datetime import datetime
from pathlib import Path
from typing import Any

import pytest

from alerter.config import Config, SinkSettings, SinkTarget
from alerter.delivery import SinkWorker
from alerter.sinks import Outgoing, cloud_event
from alerter.store import Store

from .conftest_redis import redis_url, store  # noqa: F401 - fixtures
from .test_sinks_http import H1, H2, Hook, alert, hook, push_hour, update  # noqa: F401 - fixtures

SCHEMA = json.loads((Path(__file__).parent / "data" / "cloudevents-1.0-schema.json").read_text())
TYPES = {"string": str, "number": (int, float), "boolean": bool, "object": dict}


def _format_ok(fmt: str, value: str) -> bool:
    if fmt == "date-time":
        return bool(re.match(r"^\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d(\.\d+)?(Z|[+-]\d\d:\d\d)$", value)) and \
            datetime.fromisoformat(value.replace("Z", "+00:00")) is not None
    if fmt == "uri":
        return bool(re.match(r"^[A-Za-z][A-Za-z0-9+.-]*:\S+$", value))
    return " " not in value  # uri-reference: anything without spaces (a relative path is fine)


def _type_error(value: Any, schema: dict[str, Any], where: str) -> str | None:
    """The ``type`` keyword (a bool is not a number); None when it matches or is absent."""
    if "type" not in schema:
        return None
    kinds = schema["type"] if isinstance(schema["type"], list) else [schema["type"]]
    if any(isinstance(value, TYPES[k]) and not (k == "number" and isinstance(value, bool)) for k in kinds):
        return None
    return f"{where}: {value!r} is not of type {kinds}"


def _string_errors(value: str, schema: dict[str, Any], where: str) -> list[str]:
    """``minLength``, ``pattern`` and ``format`` of a string."""
    errors: list[str] = []
    if len(value) < schema.get("minLength", 0):
        errors.append(f"{where}: shorter than {schema['minLength']}")
    if "pattern" in schema and not re.search(schema["pattern"], value):
        errors.append(f"{where}: {value!r} does not match {schema['pattern']}")
    if "format" in schema and not _format_ok(schema["format"], value):
        errors.append(f"{where}: {value!r} is not a {schema['format']}")
    return errors


def _member_errors(key: str, value: Any, schema: dict[str, Any], where: str) -> list[str]:
    """One object member against ``properties``, then ``patternProperties``, then ``additionalProperties``."""
    if key in schema.get("properties", {}):
        return validate(value, schema["properties"][key], f"{where}.{key}")
    sub = next((s for p, s in schema.get("patternProperties", {}).items() if re.match(p, key)), None)
    if sub is not None:
        return validate(value, sub, f"{where}.{key}")
    if schema.get("additionalProperties") is False:
        return [f"{where}: unexpected member {key}"]
    return []


def _object_errors(value: dict[str, Any], schema: dict[str, Any], where: str) -> list[str]:
    """``required`` members, then each member in order."""
    errors = [f"{where}: missing {k}" for k in schema.get("required", []) if k not in value]
    for k, v in value.items():
        errors += _member_errors(k, v, schema, where)
    return errors


def validate(value: Any, schema: dict[str, Any], where: str = "$") -> list[str]:
    """The subset of JSON Schema the CloudEvents file uses (see data/README-cloudevents.md)."""
    wrong_type = _type_error(value, schema, where)
    if wrong_type is not None:
        return [wrong_type]
    errors: list[str] = []
    if "const" in schema and value != schema["const"]:
        errors.append(f"{where}: {value!r} != {schema['const']!r}")
    if isinstance(value, str):
        errors += _string_errors(value, schema, where)
    if isinstance(value, dict):
        errors += _object_errors(value, schema, where)
    return errors


@pytest.mark.parametrize(("event", "problem"), [
    ({"specversion": "1.0", "id": "x", "source": "/a", "type": "t"}, None),
    ({"specversion": "0.3", "id": "x", "source": "/a", "type": "t"}, "!= '1.0'"),
    ({"specversion": "1.0", "source": "/a", "type": "t"}, "missing id"),
    ({"specversion": "1.0", "id": "", "source": "/a", "type": "t"}, "shorter"),
    ({"specversion": "1.0", "id": "x", "source": "/a", "type": "t", "time": "yesterday"}, "date-time"),
    ({"specversion": "1.0", "id": "x", "source": "/a", "type": "t", "Bad_Name": 1}, "unexpected member"),
    ({"specversion": "1.0", "id": "x", "source": "/a", "type": "t", "traceparent": "00-ab"}, None),
])
def test_the_validator_itself(event: dict[str, Any], problem: str | None) -> None:
    errors = validate(event, SCHEMA)
    assert (not errors) if problem is None else any(problem in e for e in errors), errors


def test_pure_event_has_required_attributes() -> None:
    msg = Outgoing("incident|i|1", "incident", H1, "t", "text", "i", 1, "open", "/news", {"a": 1})
    event = cloud_event(msg, "/alerter/p0")
    assert {k: event[k] for k in ("specversion", "id", "source", "type")} == {
        "specversion": "1.0", "id": "incident|i|1", "source": "/alerter/p0", "type": "alerter.incident.v1"}
    assert validate(event, SCHEMA) == []


def test_every_posted_event_validates_and_keeps_its_id_on_retry(store: Store, hook: Hook,  # noqa: F811
                                                                monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("TEST_CE_URL", hook.url)
    hook.script = [(500, {}), (503, {})]
    push_hour(store, [alert("/a", H1), alert("/b", H1)], [update("inc-1", 1, H1, ("/a", "/b"))])
    push_hour(store, [alert("/a", H2)], [update("inc-1", 2, H2, ("/a", "/b"), "growing")])
    target = SinkTarget(name="events", kind="cloudevents", url_env="TEST_CE_URL", entries="all",
                        source="/alerter/p0")
    cfg = Config(sinks=SinkSettings(targets=[target]))
    counters = SinkWorker(cfg, target, store, sleep=lambda s: None).run(drained=True)
    assert counters["delivered"] == 5 and counters["retries"] == 2
    ids = [p["body"]["id"] for p in hook.posts]
    assert ids[:3] == [ids[0]] * 3  # two failures and the success carry the same id
    assert len(set(ids[2:])) == 5
    for post in hook.posts:
        assert post["headers"]["content-type"].startswith("application/cloudevents+json")
        assert post["headers"]["idempotency-key"] == post["body"]["id"]
        assert validate(post["body"], SCHEMA) == [], post["body"]
    types = [p["body"]["type"] for p in hook.posts[2:]]
    assert types == ["alerter.alert.v1", "alerter.alert.v1", "alerter.incident.v1", "alerter.alert.v1",
                     "alerter.incident.v1"]
    assert "not proof of cause" in hook.posts[-1]["body"]["data"]["text"]
