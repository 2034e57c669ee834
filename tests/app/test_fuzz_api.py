"""Property-based fuzzing of every route from the app's own OpenAPI description: no input gets a 500.

Bodies are drawn from each route's request schema (a small JSON-schema walker below) and from arbitrary JSON;
path and query values from their schemas and from hostile text and huge numbers. The requests come
from a signed-in admin (who may reach every route) and an annotator, with valid anti-forgery tokens,
so the fuzzing reaches the handlers rather than stopping at the guard.
"""

from __future__ import annotations

import json
import re
from collections import Counter
from typing import Any
from urllib.parse import quote

from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from app.deps import COOKIE
from app.people import csrf_token

from .conftest import invite, label_some

HOSTILE_TEXT = st.sampled_from(["", " ", "0", "-1", str(2**63), str(2**64), "1e309", "nan", "inf", "²", "٣", "../../etc/passwd", "%00", "a" * 3000,
                                "<script>", "'; DROP TABLE labels; --", "\u202e", "\x00"])
ANY_TEXT = st.one_of(HOSTILE_TEXT, st.text(max_size=40))
ANY_NUMBER = st.one_of(st.integers(min_value=-(2**70), max_value=2**70), st.floats(allow_nan=True, allow_infinity=True))
ANY_JSON = st.recursive(st.one_of(st.none(), st.booleans(), ANY_NUMBER, ANY_TEXT), lambda inner: st.lists(inner, max_size=4) | st.dictionaries(ANY_TEXT, inner, max_size=4),
                        max_leaves=12)


def from_schema(schema: dict[str, Any], components: dict[str, Any], depth: int = 0) -> st.SearchStrategy[Any]:
    """Values that fit ``schema`` (the subset of JSON schema FastAPI writes), edges included; anything at depth > 4."""
    if depth > 4:
        return ANY_JSON
    if "$ref" in schema:
        return from_schema(components["schemas"][schema["$ref"].rsplit("/", 1)[-1]], components, depth + 1)
    for key in ("anyOf", "oneOf", "allOf"):
        if key in schema:
            return st.one_of([from_schema(sub, components, depth + 1) for sub in schema[key]])
    kind = schema.get("type")
    if kind == "object":
        props = {k: from_schema(v, components, depth + 1) for k, v in schema.get("properties", {}).items()}
        required = set(schema.get("required", []))
        return st.fixed_dictionaries({k: v for k, v in props.items() if k in required}, optional={k: v for k, v in props.items() if k not in required})
    if kind == "array":
        return st.lists(from_schema(schema.get("items", {}), components, depth + 1), max_size=min(12, schema.get("maxItems", 12) + 2))
    if kind == "string":
        low, high = schema.get("minLength", 0), schema.get("maxLength", 80)
        return st.one_of(st.text(min_size=low, max_size=min(high, 80)), st.text(min_size=max(0, low - 1), max_size=low), st.just("x" * (high + 1)), HOSTILE_TEXT)
    if kind == "integer":
        return st.one_of(st.integers(min_value=schema.get("minimum", -(2**64)), max_value=schema.get("maximum", 2**64)), ANY_NUMBER)
    if kind == "number":
        return ANY_NUMBER
    if kind == "boolean":
        return st.one_of(st.booleans(), ANY_TEXT)
    if kind == "null":
        return st.none()
    return ANY_JSON


def _value(schema: dict[str, Any] | None, components: dict[str, Any]) -> st.SearchStrategy[Any]:
    drawn = from_schema(schema, components) if schema else st.nothing()
    return st.one_of(drawn, ANY_TEXT, ANY_NUMBER.map(str))


def _operations(client: TestClient) -> list[tuple[str, str, dict[str, Any]]]:
    schema = client.app.openapi()  # type: ignore[attr-defined]
    return [(method.upper(), path, op) for path, ops in schema["paths"].items() for method, op in ops.items()], schema.get("components", {})  # type: ignore[return-value]


def _request(op: dict[str, Any], components: dict[str, Any]) -> st.SearchStrategy[dict[str, Any]]:
    params = op.get("parameters", [])
    likely = {"fmt": ["csv", "json", "parquet"], "kind": ["frequency", "lift"]}
    path = st.fixed_dictionaries({p["name"]: st.one_of(st.sampled_from(likely.get(p["name"], ["1", "2", "3"])), _value(p.get("schema"), components))
                                  for p in params if p["in"] == "path"})
    query = st.fixed_dictionaries({}, optional={p["name"]: _value(p.get("schema"), components) for p in params if p["in"] == "query"})
    content = op.get("requestBody", {}).get("content", {})
    if "application/json" in content:
        body = st.one_of(from_schema(content["application/json"]["schema"], components), ANY_JSON).map(lambda b: ("json", b))
    elif "application/x-www-form-urlencoded" in content:
        form = content["application/x-www-form-urlencoded"]["schema"]
        fields = form.get("properties") or components.get("schemas", {}).get(form.get("$ref", "").rsplit("/", 1)[-1], {}).get("properties", {})
        body = st.fixed_dictionaries({}, optional={k: ANY_TEXT for k in fields}).map(lambda b: ("form", b))
    else:
        body = st.just(("none", None))
    return st.fixed_dictionaries({"path": path, "query": query, "body": body, "who": st.sampled_from(["admin", "annotator"])})


def test_no_input_gets_a_server_error(client: TestClient, project: Any, campaign_id: int) -> None:
    label_some(project, campaign_id)
    sessions = {}
    for role in ("admin", "annotator"):
        client.cookies.clear()
        token = invite(client, f"fuzz {role}", role=role)
        page = client.get(f"/join/{token}")
        client.post(f"/join/{token}", data={"join": page.context["join_token"]}, follow_redirects=False)  # type: ignore[attr-defined]
        cookie = client.cookies[COOKIE]
        sessions[role] = {"cookie": f"{COOKIE}={cookie}", "x-csrf-token": csrf_token(client.app.state.key, cookie)}  # type: ignore[attr-defined]
    client.cookies.clear()
    operations, components = _operations(client)  # type: ignore[misc]
    failures: list[tuple[str, str, object, int, str]] = []
    seen: Counter[int] = Counter()
    for method, template, op in operations:
        if template in ("/signout",) or template.endswith("/revoke"):
            continue  # they would end the fuzzing sessions; the matrix test covers them

        @settings(max_examples=12, deadline=None, derandomize=True, database=None, suppress_health_check=list(HealthCheck))
        @given(_request(op, components))
        def check(req: dict[str, Any]) -> None:
            url = re.sub(r"\{(\w+)\}", lambda m: quote(str(req["path"][m.group(1)]), safe="") or "x", template)
            kind, body = req["body"]
            kwargs: dict[str, Any] = {"params": {k: str(v) for k, v in req["query"].items()}, "headers": sessions[req["who"]], "follow_redirects": False}
            if kind == "json":
                # Encoded here: the client's own encoder refuses NaN and infinity, which a hostile client can send.
                kwargs["content"] = json.dumps(body)
                kwargs["headers"] = {**kwargs["headers"], "content-type": "application/json"}
            elif kind == "form":
                kwargs["data"] = {k: str(v) for k, v in body.items()}
            r = client.request(method, url, **kwargs)
            seen[r.status_code // 100] += 1
            if r.status_code >= 500:
                failures.append((method, url, body, r.status_code, r.text[:200]))

        check()
    assert not failures, failures[:5]
    assert seen[2] + seen[3] > 40 and seen[4] > 40, seen  # the fuzzing reached handlers, and was refused where it should be
