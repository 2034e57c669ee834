from __future__ import annotations

import re
import threading
import uuid

from fastapi.testclient import TestClient


def _label(client: TestClient, region_id: int, who: str, entities: list[dict[str, object]], client_id: str | None = None) -> dict[str, object]:
    r = client.post(f"/api/regions/{region_id}/labels", json={"annotator": who, "client_id": client_id or uuid.uuid4().hex, "entities": entities})
    return {"status": r.status_code, **r.json()}


def test_annotate_page_flow_saves_and_moves_on(client: TestClient) -> None:
    r = client.get("/annotate")
    assert r.template.name == "name.html"  # type: ignore[attr-defined]
    r = client.post("/annotator", data={"name": "ana"})
    assert r.template.name == "annotate.html"  # type: ignore[attr-defined]
    first = r.context["region"].region_id  # type: ignore[attr-defined]
    assert r.context["done"] == 0  # type: ignore[attr-defined]
    client_id = r.context["client_id"]  # type: ignore[attr-defined]
    r = client.post("/annotate", data={"region_id": first, "client_id": client_id, "labels": "cap: red; tag"})
    assert r.status_code == 200 and r.context["done"] == 1  # type: ignore[attr-defined]
    assert r.context["region"].region_id != first  # type: ignore[attr-defined]
    # A retry of the same submit stores nothing twice.
    client.post("/annotate", data={"region_id": first, "client_id": client_id, "labels": "cap: red; tag"})
    assert client.get("/annotate").context["done"] == 1  # type: ignore[attr-defined]


def test_bad_label_reshows_form_with_text_and_message(client: TestClient) -> None:
    r = client.post("/annotator", data={"name": "bo"})
    region = r.context["region"].region_id  # type: ignore[attr-defined]
    r = client.post("/annotate", data={"region_id": region, "client_id": uuid.uuid4().hex, "labels": ": red"})
    assert r.status_code == 422
    assert "no entity" in r.text and 'value=": red"' in r.text
    assert r.context["done"] == 0  # type: ignore[attr-defined]


def test_label_text_is_escaped(client: TestClient) -> None:
    client.post("/annotator", data={"name": "cy"})
    r = client.post("/annotate", data={"region_id": 1, "client_id": uuid.uuid4().hex, "labels": "<img src=x onerror=alert(1)>: <b>"})
    assert r.status_code == 303 or r.status_code == 200
    client.post("/annotator", data={"name": "dd"})
    r = client.post("/annotate", data={"region_id": 1, "client_id": uuid.uuid4().hex, "labels": "<script>x</script>;;:"})
    assert "<script>x</script>" not in r.text


def test_api_next_label_and_errors(client: TestClient) -> None:
    nxt = client.get("/api/regions/next", params={"annotator": "eve"}).json()
    rid = nxt["region_id"]
    assert client.get(nxt["crop_url"]).headers["content-type"] == "image/png"
    assert client.get(nxt["outline_url"]).status_code == 200
    cid = uuid.uuid4().hex
    assert _label(client, rid, "eve", [{"entity": "Cap", "attributes": ["red"]}], cid) == {"status": 201, "stored": True, "region_id": rid}
    assert _label(client, rid, "eve", [{"entity": "Cap", "attributes": ["red"]}], cid)["stored"] is False
    dup = _label(client, rid, "eve", [{"entity": "cap"}])
    assert dup["status"] == 409 and dup["code"] == "conflict"
    missing = client.get("/api/regions/99999/crop.png")
    assert missing.status_code == 404 and set(missing.json()) == {"message", "code", "status"}
    bad = client.post(f"/api/regions/{rid}/labels", json={"annotator": "eve"})
    assert bad.status_code == 422 and bad.json()["code"] == "invalid_request"
    empty = _label(client, rid, "fay", [])
    assert empty["status"] == 422 and "nothing recognisable" in str(empty["message"])


def test_concurrent_labels_never_lock_or_duplicate(client: TestClient) -> None:
    rid = client.get("/api/regions/next", params={"annotator": "x0"}).json()["region_id"]
    results: list[int] = []

    def go(i: int) -> None:
        r = client.post(f"/api/regions/{rid}/labels", json={"annotator": f"w{i}", "client_id": f"client-{i:04d}", "entities": [{"entity": "tag"}]})
        results.append(r.status_code)

    threads = [threading.Thread(target=go, args=(i,)) for i in range(8)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert results == [201] * 8


def test_results_and_exports_after_labels(client: TestClient) -> None:
    assert client.get("/exports/rules.csv").status_code == 404
    for who in ("p", "q"):
        while (nxt := client.get("/api/regions/next", params={"annotator": who}).json()) is not None:
            _label(client, nxt["region_id"], who, [{"entity": "tag" if nxt["predicted"] == "can" else "=SUM(A1)"}])
    r = client.get("/results")
    assert r.template.name == "results.html" and "evidence for a human review" in r.text  # type: ignore[attr-defined]
    csv_text = client.get("/exports/rules.csv").text
    assert csv_text.startswith("class,concepts,support,confidence,lift,n_images")
    assert not re.search(r"(^|,)=SUM", csv_text, re.M)
    concepts = client.get("/exports/concepts.csv").text
    assert "true_class" in concepts.splitlines()[0]
