"""Route-level faults: what an annotator may see and label, files only from the project, state changes only on
POST, errors that name the field, structured labels stored as sent, submission ids that stay spent."""

from __future__ import annotations

import uuid
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from sqlalchemy import func, select, update

from app.cli import main
from app.db import write_session
from app.deps import COOKIE
from app.models import Invite, Label, Lease, RegionRow
from app.people import session_cookie

from .conftest import csrf_of, invite, join, next_task, start

pytestmark = pytest.mark.both_databases


def _count(client: TestClient, table: type) -> int:
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        return int(s.scalar(select(func.count()).select_from(table)) or 0)


def test_an_annotator_sees_and_labels_only_regions_handed_to_them(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "ann", campaign=campaign_id)
    mine = next_task(client, campaign_id).json()["task"]["region_id"]
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        other = s.scalar(select(RegionRow.id).where(RegionRow.id.not_in(select(Lease.region_id))).limit(1))
    for kind in ("crop", "outline", "overlay"):
        assert client.get(f"/api/regions/{mine}/{kind}.png").status_code == 200
        r = client.get(f"/api/regions/{other}/{kind}.png")
        assert r.status_code == 404 and "not one of the regions handed to you" in r.json()["message"], kind
    body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap"}]}
    r = client.post(f"/api/campaigns/{campaign_id}/regions/{other}/labels", json=body, headers={"X-CSRF-Token": csrf})
    assert r.status_code == 403 and "not handed to you" in r.json()["message"]
    r = client.post(f"/campaigns/{campaign_id}/label", data={"csrf": csrf, "region_id": str(other), "client_id": uuid.uuid4().hex, "labels": "cap"})
    assert _count(client, Label) == 0
    join(client, "rev", role="reviewer")  # reviewers and up see every region
    assert client.get(f"/api/regions/{other}/crop.png").status_code == 200


def test_files_are_served_only_from_inside_the_project_folder(client: TestClient, campaign_id: int, tmp_path: Path) -> None:
    secret = tmp_path / "outside.png"
    secret.write_bytes(b"\x89PNG not yours")
    join(client, "ann", campaign=campaign_id)
    rid = next_task(client, campaign_id).json()["task"]["region_id"]
    for stored in (str(secret), "../outside.png", "runs/../../outside.png"):
        with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
            s.execute(update(RegionRow).where(RegionRow.id == rid).values(crop_path=stored))
        r = client.get(f"/api/regions/{rid}/crop.png")
        assert r.status_code == 404 and "outside the project folder" in r.json()["message"] and b"not yours" not in r.content, stored


def test_state_changes_only_on_post(client: TestClient, campaign_id: int) -> None:
    token = invite(client, "ann", campaign=campaign_id)
    r = client.get(f"/join/{token}", follow_redirects=False)  # a link opened (or fetched by another site) signs nobody in
    assert r.status_code == 200 and COOKIE not in client.cookies
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        assert s.scalar(select(Invite.last_used_at)) is None
    forged = client.post(f"/join/{token}", data={"join": "0" * 40}, follow_redirects=False)  # a form posted from another site
    assert forged.status_code == 403 and COOKIE not in client.cookies
    client.cookies.delete("heedmap_join", path="/join")
    r = client.post(f"/join/{token}", data={"join": r.context["join_token"]}, follow_redirects=False)  # type: ignore[attr-defined]
    assert r.status_code == 403  # the page's token without the page's same-site cookie
    join(client, "ann", campaign=campaign_id)
    for _ in range(3):
        page = client.get(f"/campaigns/{campaign_id}/label")
        assert page.status_code == 200 and page.context["task"] is None and "data-start" in page.text  # type: ignore[attr-defined]
    assert _count(client, Lease) == 0
    assert client.get(f"/api/campaigns/{campaign_id}/tasks/next").status_code == 405
    page = start(client, campaign_id)
    assert page.context["task"] is not None and _count(client, Lease) == 2  # type: ignore[attr-defined]
    again = client.get(f"/campaigns/{campaign_id}/label")  # a reload shows the same region, taking nothing new
    assert again.context["task"].region_id == page.context["task"].region_id and _count(client, Lease) == 2  # type: ignore[attr-defined]


def test_out_of_range_values_answer_4xx_naming_the_field(client: TestClient, project: Path, campaign_id: int,
                                                         capsys: pytest.CaptureFixture[str]) -> None:
    csrf = join(client, "root", role="admin")
    for url in (f"/api/regions/{2**63}/crop.png", f"/api/regions/{2**64}/overlay.png", f"/campaigns/{2**63}/results", f"/admin/campaigns/{2**63}"):
        r = client.get(url)
        assert 400 <= r.status_code < 500 and "_id" in r.text, url
    r = client.post("/admin/campaigns", data={"csrf": csrf, "name": "x", "run_id": "1", "lease_minutes": "nan"})
    assert r.status_code == 422 and "lease_minutes" in r.text
    r = client.post("/admin/campaigns", data={"csrf": csrf, "name": "x", "run_id": "1", "lease_minutes": "inf"})
    assert r.status_code == 422 and "lease_minutes" in r.text
    r = client.post("/admin/campaigns", data={"csrf": csrf, "name": "x", "run_id": "1", "labels_per_region": "0"})
    assert r.status_code == 422 and "labels per region" in r.text
    r = client.post("/admin/invites", data={"csrf": csrf, "name": "kim", "role": "annotator", "campaign_id": str(10**30)})
    assert r.status_code == 422 and "campaign must be a number" in r.text
    client.cookies.clear()
    key = client.app.state.key  # type: ignore[attr-defined]
    for bad in ("²." + "0" * 64, "٣." + "0" * 64, session_cookie(key, 2**63 + 5), session_cookie(key, 10**30)):  # odd digits, huge ids
        raw = {"cookie": f"{COOKIE}={bad}".encode()}
        assert client.get("/", headers=raw).status_code == 200 and client.get("/admin", headers=raw).status_code == 401, bad
    for minutes in ("nan", "inf", "-inf"):
        assert main(["campaign", str(project), "--name", f"c {minutes}", f"--lease-minutes={minutes}"]) == 1
        assert "--lease-minutes" in capsys.readouterr().err
    assert main(["campaign", str(project), "--name", "zero", "--per-region", "0"]) == 1
    assert "labels per region" in capsys.readouterr().err


def test_json_labels_are_stored_as_sent_and_separators_refused(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "ann", campaign=campaign_id)
    h = {"X-CSRF-Token": csrf}
    rid = next_task(client, campaign_id).json()["task"]["region_id"]
    url = f"/api/campaigns/{campaign_id}/regions/{rid}/labels"
    for entity, attributes, where in (("cap; tag", [], "entities[0].entity"), ("cap", ["red, torn"], "entities[0].attributes[0]"),
                                      ("cap: red", [], "entities[0].entity"), ("cap\nrim", [], "entities[0].entity")):
        r = client.post(url, json={"client_id": uuid.uuid4().hex, "entities": [{"entity": entity, "attributes": attributes}]}, headers=h)
        assert r.status_code == 422 and where in r.json()["message"], (entity, attributes)
    body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": " label   band ", "attributes": ["torn", "off-white"]}, {"entity": "Cap"}]}
    assert client.post(url, json=body, headers=h).status_code == 201
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        assert s.scalar(select(Label.entities)) == [["label band", ["torn", "off-white"]], ["Cap", []]]


def test_a_submission_id_stays_spent(client: TestClient, campaign_id: int) -> None:
    csrf = join(client, "ann", campaign=campaign_id)
    h = {"X-CSRF-Token": csrf}
    rid = next_task(client, campaign_id).json()["task"]["region_id"]
    url = f"/api/campaigns/{campaign_id}/regions/{rid}/labels"
    body = {"client_id": uuid.uuid4().hex, "entities": [{"entity": "cap", "attributes": ["red"]}]}
    assert client.post(url, json=body, headers=h).json() == {"stored": True, "region_id": rid}
    assert client.post(url, json=body, headers=h).json() == {"stored": False, "region_id": rid}  # the same retry: stored once
    changed = client.post(url, json={**body, "entities": [{"entity": "tag"}]}, headers=h)
    assert changed.status_code == 409 and "'cap: red'" in changed.json()["message"]  # says what is stored; keeps it
    assert client.post(f"/api/campaigns/{campaign_id}/undo", headers=h).json()["region_id"] == rid
    late = client.post(url, json=body, headers=h)  # the first submit's late retry, after the undo
    assert late.status_code == 409 and "undone" in late.json()["message"]
    assert _count(client, Label) == 0
    fresh = client.post(url, json={**body, "client_id": uuid.uuid4().hex, "entities": [{"entity": "tag"}]}, headers=h)
    assert fresh.status_code == 201 and _count(client, Label) == 1
    assert csrf_of(client) == csrf


def test_an_extreme_image_gets_no_overlay_and_large_ones_are_bounded(client: TestClient, campaign_id: int, tmp_path: Path) -> None:
    from PIL import Image

    from app.models import ImageRow, Prediction

    join(client, "rev", role="reviewer")
    with client.app.state.sessions() as s:  # type: ignore[attr-defined]
        image_id = s.scalar(select(Prediction.image_id).join(RegionRow, RegionRow.prediction_id == Prediction.id).where(RegionRow.id == 1))
    for size, expected in (((8000, 1), 422), ((3000, 2000), 200)):
        Image.new("RGB", size, "white").save(tmp_path / "odd.png")
        with write_session(client.app.state.sessions) as s:  # type: ignore[attr-defined]
            s.execute(update(ImageRow).where(ImageRow.id == image_id).values(path=str(tmp_path / "odd.png")))
        r = client.get("/api/regions/1/overlay.png")
        assert r.status_code == expected, r.text[:200]
        if expected == 422:
            assert "8000x1" in r.json()["message"] and "too elongated" in r.json()["message"]
        else:
            import io

            assert max(Image.open(io.BytesIO(r.content)).size) <= 1024
