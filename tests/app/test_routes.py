from __future__ import annotations

import re
import uuid
from datetime import timedelta
from typing import Any

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select

from app.db import write_session
from app.deps import COOKIE
from app.models import Invite, Label, utcnow
from app.people import revoke_invite

from .conftest import invite, join, next_task, start

pytestmark = pytest.mark.both_databases


def _label_count(client: TestClient) -> int:
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        return int(s.scalar(select(func.count(Label.id))) or 0)


def _post_label(client: TestClient, cid: int, csrf: str, text: str, **extra: str) -> Any:
    page = start(client, cid)
    data = {"csrf": csrf, "region_id": page.context["task"].region_id, "client_id": page.context["client_id"], "labels": text, **extra}  # type: ignore[attr-defined]
    return page, client.post(f"/campaigns/{cid}/label", data=data)


def test_invite_link_signs_in_and_label_page_saves_and_moves_on(client: TestClient, campaign_id: int) -> None:
    token = invite(client, "ana", campaign=campaign_id)
    shown = client.get(f"/join/{token}", follow_redirects=False)  # opening the link only asks
    assert shown.status_code == 200 and shown.template.name == "join.html" and "ana" in shown.text  # type: ignore[attr-defined]
    r = client.post(f"/join/{token}", data={"join": shown.context["join_token"]}, follow_redirects=False)  # type: ignore[attr-defined]
    assert r.status_code == 303 and r.headers["location"] == f"/campaigns/{campaign_id}/label"
    csrf = join(client, "ana", campaign=campaign_id)
    page = start(client, campaign_id)
    assert page.template.name == "annotate.html" and page.context["done"] == 0  # type: ignore[attr-defined]
    assert "Name the &lt;b&gt;parts&lt;/b&gt;." in page.text  # instructions are text, escaped
    first, client_id = page.context["task"].region_id, page.context["client_id"]  # type: ignore[attr-defined]
    upcoming = page.context["upcoming"].region_id  # type: ignore[attr-defined]
    assert f'rel="prefetch" href="/api/regions/{upcoming}/crop.png"' in page.text  # the next crop is preloaded
    data = {"csrf": csrf, "region_id": first, "client_id": client_id, "labels": "cap: red; tag", "seconds_spent": "3.5"}
    nxt = client.post(f"/campaigns/{campaign_id}/label", data=data)
    assert nxt.context["done"] == 1 and nxt.context["task"].region_id == upcoming  # type: ignore[attr-defined]
    # A retry of the same submit (a dropped connection) stores nothing twice.
    client.post(f"/campaigns/{campaign_id}/label", data=data)
    assert _label_count(client) == 1


def test_bad_label_reshows_the_same_region_with_text_and_message(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "bo")
    page, r = _post_label(client, campaign_id, csrf, ": red")
    assert r.status_code == 422 and "no entity" in r.text and 'value=": red"' in r.text
    assert r.context["task"].region_id == page.context["task"].region_id and r.context["done"] == 0  # type: ignore[attr-defined]
    _, r = _post_label(client, campaign_id, csrf, "x" * 61)
    assert r.status_code == 422 and "longer than 60" in r.text
    _, r = _post_label(client, campaign_id, csrf, "cap", nothing="1")
    assert r.status_code == 422 and "cannot also be nothing recognisable" in r.text
    assert _label_count(client) == 0


def test_labels_stay_text_everywhere(client: TestClient, campaign_id: int) -> None:
    payload = "<img src=x onerror=alert(1)>"
    csrf = join(client, "cy")
    _post_label(client, campaign_id, csrf, f"{payload}: <b>bold</b>")
    back = client.post(f"/campaigns/{campaign_id}/undo", data={"csrf": csrf})  # the page shows the text again to edit
    assert payload not in back.text and "&lt;img src=x onerror=alert(1)&gt;" in back.text
    _post_label(client, campaign_id, csrf, payload)
    join(client, "ed", role="analyst")
    for url in (f"/campaigns/{campaign_id}/synonyms", f"/campaigns/{campaign_id}/agreement"):
        r = client.get(url)
        assert r.status_code == 200 and "<img src=x" not in r.text, url


def test_forged_requests_are_refused_and_store_nothing(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "dd")
    page = start(client, campaign_id)
    data = {"region_id": page.context["task"].region_id, "client_id": uuid.uuid4().hex, "labels": "cap"}  # type: ignore[attr-defined]
    for bad in ({}, {"csrf": "0" * 40}):
        r = client.post(f"/campaigns/{campaign_id}/label", data={**data, **bad})
        assert r.status_code == 403 and "anti-forgery" in r.text
    body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap"}]}
    rid = page.context["task"].region_id  # type: ignore[attr-defined]
    assert client.post(f"/api/campaigns/{campaign_id}/regions/{rid}/labels", json=body).status_code == 403
    # Another session's token is no good here either.
    other = csrf
    join(client, "ee")
    assert client.post(f"/api/campaigns/{campaign_id}/regions/{rid}/labels", json=body, headers={"X-CSRF-Token": other}).status_code == 403
    assert _label_count(client) == 0


def test_expired_and_revoked_invites_are_refused(client: TestClient, campaign_id: int) -> None:
    stale = invite(client, "fay", now=utcnow() - timedelta(days=15))  # made 15 days ago for 14 days
    r = client.get(f"/join/{stale}")
    assert r.status_code == 403 and "expired" in r.text
    assert client.get("/join/not-a-real-token").status_code == 403
    join(client, "gus")
    assert client.get(f"/campaigns/{campaign_id}/label").status_code == 200
    invite_id = int(client.cookies[COOKIE].split(".")[0])
    with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
        s.get(Invite, invite_id).expires_at = utcnow() - timedelta(seconds=1)  # type: ignore[union-attr]
    r = client.get(f"/campaigns/{campaign_id}/label")
    assert r.status_code == 403 and "expired" in r.text
    join(client, "gus")
    with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
        revoke_invite(s, int(client.cookies[COOKIE].split(".")[0]))
    r = client.get(f"/campaigns/{campaign_id}/label")
    assert r.status_code == 403 and "revoked" in r.text


def test_roles_gate_the_pages(client: TestClient, campaign_id: int) -> None:
    assert client.get(f"/campaigns/{campaign_id}/label").status_code == 401
    assert client.post("/api/campaigns/1/tasks/next").json()["code"] == "sign_in_required"
    join(client, "hal", campaign=campaign_id)
    for url in ("/admin", f"/campaigns/{campaign_id}/results", f"/campaigns/{campaign_id}/agreement", f"/admin/campaigns/{campaign_id}/labels.csv"):
        assert client.get(url).status_code == 403, url
    join(client, "ivy", role="reviewer")
    assert client.get("/admin").status_code == 403
    csrf = join(client, "ivy", role="reviewer")
    r = client.post(f"/campaigns/{campaign_id}/synonyms", data={"csrf": csrf, "kind": "merge", "source": "lid", "target": "cap"})
    assert r.status_code == 403 and "analyst" in r.text


def test_json_api_next_label_retry_skip_undo(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "eve")
    h = {"X-CSRF-Token": csrf}
    nxt = next_task(client, campaign_id).json()
    rid = nxt["task"]["region_id"]
    for key in ("crop_url", "outline_url", "overlay_url"):
        r = client.get(nxt["task"][key])
        assert r.status_code == 200 and r.headers["content-type"] == "image/png" and r.content[:4] == b"\x89PNG"
    body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": "Cap", "attributes": ["red"]}], "seconds_spent": 2.0}
    url = f"/api/campaigns/{campaign_id}/regions/{rid}/labels"
    assert client.post(url, json=body, headers=h).json() == {"stored": True, "region_id": rid}
    assert client.post(url, json=body, headers=h).json() == {"stored": False, "region_id": rid}
    dup = client.post(url, json={**body, "client_id": uuid.uuid4().hex}, headers=h)
    assert dup.status_code == 409 and dup.json()["code"] == "conflict" and "undo" in dup.json()["message"]
    skipped = next_task(client, campaign_id).json()["task"]["region_id"]
    assert client.post(f"/api/campaigns/{campaign_id}/regions/{skipped}/skip", headers=h).status_code == 204
    assert next_task(client, campaign_id).json()["task"]["region_id"] not in (rid, skipped)
    undone = client.post(f"/api/campaigns/{campaign_id}/undo", headers=h).json()
    assert undone == {"region_id": rid, "text": "Cap: red", "group_id": None, "regions": [rid]}
    assert next_task(client, campaign_id).json()["task"]["region_id"] == rid
    vocab = client.get(f"/api/campaigns/{campaign_id}/vocabulary").json()
    assert "red" in vocab["attributes"] and "torn" in vocab["attributes"]


def test_errors_share_one_json_shape(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "joe")
    h = {"X-CSRF-Token": csrf}
    responses = [
        client.get("/api/regions/99999/crop.png"),
        next_task(client, 999),
        client.post(f"/api/campaigns/{campaign_id}/regions/1/labels", json={"entities": []}, headers=h),
        client.post(f"/api/campaigns/{campaign_id}/regions/1/labels", json={"client_id": uuid.uuid4().hex, "entities": []}, headers=h),
        client.post(f"/api/campaigns/{campaign_id}/regions/99999/labels", json={"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap"}]}, headers=h),
    ]
    assert [r.status_code for r in responses] == [404, 404, 422, 422, 404]
    for r in responses:
        assert set(r.json()) == {"message", "code", "status"} and r.json()["status"] == r.status_code
    assert "nothing_recognisable" in responses[3].json()["message"]


def test_admin_makes_campaigns_invites_and_check_items(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "root", role="admin")
    r = client.post("/admin/campaigns", data={"csrf": csrf, "name": "bottles only", "run_id": "1", "classes": ["bottle"], "labels_per_region": "3"})
    assert r.status_code == 200 and r.template.name == "campaign_admin.html", r.text[:3000]  # type: ignore[attr-defined]
    bad = client.post("/admin/campaigns", data={"csrf": csrf, "name": "bottles only", "run_id": "1"})
    assert bad.status_code == 409 and "exists already" in bad.text and 'value="bottles only"' in bad.text
    made = client.post("/admin/invites", data={"csrf": csrf, "name": "kim", "role": "annotator", "campaign_id": str(campaign_id), "days": "7"})
    link = re.search(r"http://testserver/join/[\w-]+", made.text)
    assert link is not None
    client.post(f"/admin/campaigns/{campaign_id}/checks", data={"csrf": csrf, "region_id": "2", "answer": "cap: red"})
    page = client.get(f"/admin/campaigns/{campaign_id}")
    assert page.context["answers"] == {2: "cap: red"}  # type: ignore[attr-defined]
    bad = client.post(f"/admin/campaigns/{campaign_id}/checks", data={"csrf": csrf, "region_id": "3", "answer": ""})
    assert bad.status_code == 422 and "nothing recognisable" in bad.text
    client.post(f"/admin/campaigns/{campaign_id}/checks", data={"csrf": csrf, "region_id": "4", "answer": "tag: yellow", "role": "example"})
    assert client.get(f"/admin/campaigns/{campaign_id}").context["examples"] == [(4, "tag: yellow")]  # type: ignore[attr-defined]
    label_page = client.get(f"/campaigns/{campaign_id}/label")
    assert "data-examples" in label_page.text and "/api/regions/4/crop.png" in label_page.text
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        kim = s.scalar(select(Invite.id).order_by(Invite.id.desc()).limit(1))
    client.post(f"/admin/invites/{kim}/revoke", data={"csrf": csrf})
    client.cookies.clear()
    assert client.get(link.group(0).replace("http://testserver", "")).status_code == 403


def _label_everything(client: TestClient, campaign_id: int) -> None:
    """Two annotators label every region: p says "lid" where q says "cap" on half of them; both name the tag on cans."""
    for who in ("p", "q"):
        csrf = join(client, who)
        h = {"X-CSRF-Token": csrf}
        while (nxt := next_task(client, campaign_id).json()["task"]) is not None:
            if nxt["region_id"] % 2:
                entities = [{"entity": "tag"}] if nxt["predicted"] == "can" else [{"entity": "=SUM(A1)"}, {"entity": "rim"}]
            else:
                entities = [{"entity": "lid" if who == "p" else "cap", "attributes": ["red"]}]
            body = {"client_id": uuid.uuid4().hex, "entities": entities}
            assert client.post(f"/api/campaigns/{campaign_id}/regions/{nxt['region_id']}/labels", json=body, headers=h).status_code == 201


def test_results_exports_and_report(client: TestClient, campaign_id: int) -> None:
    _label_everything(client, campaign_id)
    join(client, "rev", role="reviewer")
    base = f"/campaigns/{campaign_id}"
    r = client.get(f"{base}/results")
    assert r.template.name == "results.html" and "evidence for a human review" in r.text  # type: ignore[attr-defined]
    assert set(r.context["by_class"]) <= {"bottle", "can", "carton"} and r.context["rules"].n_tested > 0  # type: ignore[attr-defined]
    errors_view = client.get(f"{base}/results", params={"target": "errors"})
    assert errors_view.status_code == 200 and all(" -> " in k for k in errors_view.context["by_class"])  # type: ignore[attr-defined]
    assert client.get(f"{base}/results", params={"target": "nope"}).status_code == 422
    rules = client.get(f"{base}/exports/rules.csv").text
    assert rules.startswith("class,concepts,size,n_images,support,confidence,confidence_low,lift,leverage,conviction") and not re.search(r"(^|,)[=+@-]", rules, re.M)
    doc = client.get(f"{base}/exports/rules.json").json()
    assert doc["aggregation"] == "majority" and doc["n_tested"] >= len(doc["rules"]) > 0 and {"p_value", "q_value"} <= set(doc["rules"][0])
    concepts = client.get(f"{base}/exports/concepts.csv").text.splitlines()
    assert concepts[0].startswith("image_id,aggregation,true_class,predicted_class,confidence,correct,split,concept: ")
    assert "saliency share: " in concepts[0] and concepts[1].split(",")[1] == "majority"
    assert client.get(f"{base}/exports/concepts.json").json()["rows"]
    parquet = client.get(f"{base}/exports/concepts.parquet")
    try:
        import pyarrow  # noqa: F401

        assert parquet.status_code == 200 and parquet.content[:4] == b"PAR1"
    except ImportError:
        assert parquet.status_code == 422 and "pyarrow" in parquet.text
    assert client.get(f"{base}/exports/concepts.xlsx").status_code == 404
    assert client.get(f"{base}/exports/main-labels.csv").text.startswith("item,annotator,label")
    assert client.get(f"{base}/plots/frequency.png").content[:4] == b"\x89PNG"
    report = client.get(f"{base}/report.html")
    assert report.status_code == 200 and "attachment" in report.headers["content-disposition"]
    assert "evidence for a human review" in report.text and "data:image/png;base64," in report.text
    assert not re.search(r'(src|href)="(?!data:)', report.text)  # self-contained: nothing to fetch


def test_ask_expectations_errors_and_compare(client: TestClient, campaign_id: int) -> None:
    _label_everything(client, campaign_id)
    csrf = join(client, "ana", role="analyst")
    base = f"/campaigns/{campaign_id}"
    good = client.get(f"{base}/ask", params={"q": 'rim or (rim and not "sum(a1")'})
    assert good.status_code == 200 and good.context["answer"].n_matching > 0  # type: ignore[attr-defined]
    bad = client.get(f"{base}/ask", params={"q": "rim or (tag"})
    assert bad.status_code == 422 and bad.context["column"] == 12 and "close the" in bad.text  # type: ignore[attr-defined]
    toml = '[classes.can]\nmust_not_rely_on = ["tag"]\nrelies_on = ["rim"]\n'
    assert client.post(f"{base}/expectations", data={"csrf": csrf, "text": toml}).status_code == 200
    page = client.get(f"{base}/expectations")
    assert page.context["text"] == toml and len(page.context["verdicts"]) == 2  # type: ignore[attr-defined]
    broken = client.post(f"{base}/expectations", data={"csrf": csrf, "text": "[classes.can]\nrelies_on = ['rim and']"})
    assert broken.status_code == 422 and "classes.can.relies_on" in broken.text and "rim and" in broken.text
    assert client.get(f"{base}/expectations").context["text"] == toml  # the bad file was not saved  # type: ignore[attr-defined]
    errors = client.get(f"{base}/errors", params={"threshold": 0.0})
    assert errors.status_code == 200 and errors.context["found"].n_confident == errors.context["found"].n_errors  # type: ignore[attr-defined]
    assert client.get(f"{base}/errors", params={"threshold": 3}).status_code == 422
    cmp = client.get(f"{base}/compare", params={"a": "bottle", "b": "carton"})
    assert cmp.status_code == 200 and cmp.context["comparison"].n_a > 0  # type: ignore[attr-defined]
    assert set(cmp.context["crops"]) == {"bottle", "carton"}  # type: ignore[attr-defined]
    assert client.get(f"{base}/compare", params={"a": "bottle", "b": "bottle"}).status_code == 422
    join(client, "viewer", role="reviewer")
    assert client.post(f"{base}/expectations", data={"csrf": csrf, "text": ""}).status_code == 403


def test_agreement_and_synonym_editor(client: TestClient, campaign_id: int) -> None:
    _label_everything(client, campaign_id)
    csrf = join(client, "ana", role="analyst")
    agreement = client.get(f"/campaigns/{campaign_id}/agreement")
    assert agreement.context["report"].alpha is not None and "Krippendorff" in agreement.text  # type: ignore[attr-defined]
    # Sensitivity and specificity show the pairs they rest on and an interval, never a bare figure.
    rates = agreement.context["reliability"]  # type: ignore[attr-defined]
    assert rates and all(r.sensitivity.low <= r.sensitivity.estimate <= r.sensitivity.high for r in rates.values())
    assert "(n=" in agreement.text and "Dirichlet prior" in agreement.text
    client.post(f"/campaigns/{campaign_id}/synonyms", data={"csrf": csrf, "kind": "merge", "source": "Lids", "target": "cap"})
    page = client.get(f"/campaigns/{campaign_id}/synonyms")
    assert [(x.source, x.target) for x in page.context["rules"]] == [("lid", "cap")]  # type: ignore[attr-defined]
    assert "lid" not in dict(page.context["counts"])  # type: ignore[attr-defined]
    # The merge reaches the results: "red cap" now has both annotators behind it.
    assert "red cap" in client.get(f"/campaigns/{campaign_id}/exports/concepts.csv").text.splitlines()[0]
    loop = client.post(f"/campaigns/{campaign_id}/synonyms", data={"csrf": csrf, "kind": "merge", "source": "cap", "target": "lid"})
    assert loop.status_code == 200 and "form a loop" in loop.text  # shown on the editor; the rule is not kept
    assert len(loop.context["rules"]) == 1  # type: ignore[attr-defined]
    rule_id = page.context["rules"][0].id  # type: ignore[attr-defined]
    client.post(f"/campaigns/{campaign_id}/synonyms/{rule_id}/delete", data={"csrf": csrf})
    assert "lid" in dict(client.get(f"/campaigns/{campaign_id}/synonyms").context["counts"])  # type: ignore[attr-defined]


def test_home_counts_the_latest_runs_images_and_regions(client: TestClient, campaign_id: int) -> None:
    from app import store

    join(client, "overseer", "analyst")
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        run = store.latest_run_id(s)
        assert run is not None
        preds = store.prediction_frame(s, run)
    assert f"Saliency run {run}: {len(preds)} images, {sum(len(r) for r in preds['regions'])} regions." in client.get("/").text
