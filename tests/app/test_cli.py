from __future__ import annotations

import json
from pathlib import Path

import pytest

from app.cli import main


def test_rules_command_json_and_errors(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rows = ["cls,tag,cap"] + ["can,1,0"] * 8 + ["bottle,0,1"] * 8 + ["can,0,1"] * 2
    (tmp_path / "t.csv").write_text("\n".join(rows) + "\n")
    assert main(["rules", str(tmp_path / "t.csv"), "--target", "cls", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    top = [r for r in out["rules"] if r["class"] == "can"][0]
    assert top["concepts"] == "tag" and top["confidence"] == 1.0 and top["n_images"] == 8
    assert main(["rules", str(tmp_path / "t.csv"), "--target", "nope"]) == 1
    assert "no column 'nope'" in capsys.readouterr().err


def _crowd_csv(path: Path, seed: int = 0) -> dict[str, str]:
    """A simulated crowd: two careful annotators, four careless ones, 150 items; returns the truth."""
    import numpy as np

    rng = np.random.default_rng(seed)
    truth = rng.choice(["bottle", "can", "carton"], 150)
    rows = ["item,annotator,label"]
    for a, acc in enumerate([0.95, 0.9, 0.4, 0.4, 0.35, 0.35]):
        for u, t in enumerate(truth):
            if rng.random() < 0.8:
                label = t if rng.random() < acc else rng.choice([c for c in ("bottle", "can", "carton") if c != t])
                rows.append(f"r{u},p{a},{label}")
            elif rng.random() < 0.5:
                rows.append(f"r{u},p{a},")  # a blank label is no judgment
    path.write_text("\n".join(rows) + "\n")
    return {f"r{u}": str(t) for u, t in enumerate(truth)}


def test_agreement_and_aggregate_commands(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import krippendorff
    import numpy as np
    import pandas as pd

    truth = _crowd_csv(tmp_path / "labels.csv")
    assert main(["agreement", str(tmp_path / "labels.csv"), "--json", "--bootstrap", "200"]) == 0
    rep = json.loads(capsys.readouterr().out)
    frame = pd.read_csv(tmp_path / "labels.csv", keep_default_na=False)
    wide = frame[frame.label != ""].pivot(index="annotator", columns="item", values="label")
    codes = wide.apply(lambda col: col.map({"bottle": 0, "can": 1, "carton": 2})).to_numpy(dtype=float)
    assert rep["alpha"] == pytest.approx(krippendorff.alpha(reliability_data=codes, level_of_measurement="nominal"))
    assert rep["alpha_interval"][0] <= rep["alpha"] <= rep["alpha_interval"][1]
    assert "not applicable" in rep["fleiss_note"] and len(rep["pairs"]) == 15

    accuracy = {}
    for method in ("majority", "dawid-skene", "one-coin"):
        assert main(["aggregate", str(tmp_path / "labels.csv"), "--method", method, "--json"]) == 0
        out = json.loads(capsys.readouterr().out)
        assert out["method"] == method and out["converged"]
        accuracy[method] = np.mean([it["label"] == truth[it["item"]] for it in out["items"]])
    assert accuracy["dawid-skene"] > accuracy["majority"] and accuracy["one-coin"] > accuracy["majority"]
    careful = {a["annotator"]: a["accuracy"] for a in out["annotators"]}
    assert careful["p0"] > 0.85 and careful["p5"] < 0.5

    (tmp_path / "gold.csv").write_text("item,label\nr0,carton\n")
    assert main(["aggregate", str(tmp_path / "labels.csv"), "--known", str(tmp_path / "gold.csv"), "--json"]) == 0
    fixed = json.loads(capsys.readouterr().out)["items"][0]
    assert fixed["item"] == "r0" and fixed["posterior"]["carton"] == 1.0


def test_aggregate_rejects_duplicates_and_unknown_answers(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "dup.csv").write_text("item,annotator,label\nr1,ann,can\nr1,ann,bottle\nr2,bob,can\n")
    assert main(["aggregate", str(tmp_path / "dup.csv")]) == 1
    assert "judge one item twice" in capsys.readouterr().err
    _crowd_csv(tmp_path / "labels.csv")
    (tmp_path / "gold.csv").write_text("item,label\nr0,glass\n")
    assert main(["aggregate", str(tmp_path / "labels.csv"), "--known", str(tmp_path / "gold.csv")]) == 1
    assert "not a label anyone used" in capsys.readouterr().err


def test_campaign_invite_and_checks_commands(project: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["campaign", str(project), "--name", "first pass", "--per-region", "2"]) == 0
    assert "campaign 1 (first pass) over run 1" in capsys.readouterr().out
    assert main(["campaign", str(project), "--name", "first pass"]) == 1
    assert "exists already" in capsys.readouterr().err
    assert main(["campaign", str(project), "--name", "x", "--classes", "glass"]) == 1
    assert "the classes there are" in capsys.readouterr().err
    assert main(["invite", str(project), "--name", "kim", "--campaign", "1", "--base-url", "http://sorter.local:9000"]) == 0
    out = capsys.readouterr().out
    assert "invite 1 for kim (annotator)" in out and "http://sorter.local:9000/join/" in out
    assert main(["invite", str(project), "--revoke", "1"]) == 0
    capsys.readouterr()
    assert main(["invite", str(project), "--list"]) == 0
    assert "1,kim,annotator,1,revoked" in capsys.readouterr().out
    (tmp_path / "checks.csv").write_text("region,answer\n1,cap: red\n2,\n")
    assert main(["checks", str(project), "--campaign", "1", str(tmp_path / "checks.csv")]) == 0
    assert "2 check items" in capsys.readouterr().out
    (tmp_path / "bad.csv").write_text("region,answer\n3,cap\n4,: red\n")
    assert main(["checks", str(project), "--campaign", "1", str(tmp_path / "bad.csv")]) == 1
    assert "line 3" in capsys.readouterr().err
    from app.campaigns import check_answers
    from app.db import make_engine, session_factory

    engine = make_engine(project)
    with session_factory(engine)() as s:
        assert sorted(check_answers(s, 1)) == [1, 2]  # the bad file stored nothing
    engine.dispose()


def test_aggregate_states_its_smoothing_and_each_annotators_interval(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    # Two of three say "stroke" on every region; the third once types "strok": the majority keeps its region.
    rows = ["item,annotator,label"] + [f"r{u},{a},stroke" for u in range(30) for a in ("x", "y", "z") if (u, a) != (7, "z")] + ["r7,z,strok"]
    rows += [f"r{u},{a},loop" for u in range(30, 36) for a in ("x", "y", "z")]
    (tmp_path / "labels.csv").write_text("\n".join(rows) + "\n")
    assert main(["aggregate", str(tmp_path / "labels.csv")]) == 0
    captured = capsys.readouterr()
    first = captured.out.splitlines()[0]
    assert "converged" in first and "NOT" not in first and "Dirichlet prior" in first
    assert "r7,stroke," in captured.out
    assert "accuracy (95% interval)" in captured.err and "z, 36," in captured.err
    assert main(["aggregate", str(tmp_path / "labels.csv"), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["confusion_prior"]["strength"] > 0
    z = next(a for a in out["annotators"] if a["annotator"] == "z")
    assert z["accuracy_interval"][0] < z["accuracy"] < z["accuracy_interval"][1] and z["accuracy_n"] == pytest.approx(36)
