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


def test_rules_reads_a_table_with_an_id_column(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rows = ["image,cls,tag,yellow tag,cap"] + [f"can_{i}.png,can,1,{int(i < 6)},0" for i in range(8)] + [f"bottle_{i}.png,bottle,0,0,1" for i in range(8)]
    (tmp_path / "t.csv").write_text("\n".join(rows) + "\n")
    # Without --id the file names are no concept: the message names the column and the option.
    assert main(["rules", str(tmp_path / "t.csv"), "--target", "cls"]) == 1
    err = capsys.readouterr().err
    assert "'image'" in err and "--id image" in err and "Traceback" not in err
    assert main(["rules", str(tmp_path / "t.csv"), "--target", "cls", "--id", "image", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["id_column"] == "image" and out["families"] == {"yellow tag": "tag"}
    can = [r for r in out["rules"] if r["class"] == "can"]
    assert [(r["concepts"], r["parent"], r["rank"]) for r in can] == [("tag", "", 1), ("yellow tag", "tag", 1)]
    assert can[1]["typicality"] == pytest.approx(6 / 8)
    assert main(["rules", str(tmp_path / "t.csv"), "--target", "cls", "--id", "image", "--no-families", "--json"]) == 0
    assert {r["parent"] for r in json.loads(capsys.readouterr().out)["rules"]} == {""}
    # Clear errors: an id column that is not there, one that repeats, one that is also the target.
    assert main(["rules", str(tmp_path / "t.csv"), "--target", "cls", "--id", "name"]) == 1
    assert "no column 'name'" in capsys.readouterr().err
    (tmp_path / "dup.csv").write_text("image,cls,tag\na.png,can,1\na.png,can,0\n")
    assert main(["rules", str(tmp_path / "dup.csv"), "--target", "cls", "--id", "image"]) == 1
    assert "repeats 'a.png'" in capsys.readouterr().err
    assert main(["rules", str(tmp_path / "t.csv"), "--target", "cls", "--id", "cls"]) == 1
    assert "both the id column and the target" in capsys.readouterr().err


def test_rules_reads_heedmaps_own_concept_export(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    import pandas as pd

    from analysis.concept_table import build_concept_table
    from analysis.rules import to_csv

    meta = pd.DataFrame({"true_class": ["can"] * 6 + ["bottle"] * 6, "predicted_class": ["can"] * 5 + ["bottle"] * 7, "confidence": 0.9,
                         "split": "test"}, index=pd.Index(range(100, 112), name="image_id"))  # as the app names it
    found = {r: ({"tag": 1.0, "yellow tag": 1.0} if r < 104 else {"tag": 1.0} if r < 105 else {"cap": 1.0}) for r in range(12)}
    table = build_concept_table(meta, {100 + r: [r] for r in range(12)}, {r: 0.5 for r in range(12)}, found, method="majority",
                                families={"yellow tag": "tag"})
    (tmp_path / "concepts.csv").write_text(to_csv(table.frame().reset_index()))
    assert main(["rules", str(tmp_path / "concepts.csv"), "--target", "predicted_class", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["read_as"] == "heedmap concept export" and out["id_column"] == "image_id" and out["families"] == {"yellow tag": "tag"}
    ours = {(r["class"], r["concepts"]): r for r in out["rules"]}
    direct = table.rules(target="predicted", min_support=0.02, prune=False).rules
    assert set(ours) == set(zip(direct["class"], direct["concepts"]))
    for r in direct.to_dict("records"):
        got = ours[(r["class"], r["concepts"])]
        assert (got["n_images"], got["confidence"], got["rank"], got["parent"]) == (r["n_images"], pytest.approx(r["confidence"]), r["rank"], r["parent"])
