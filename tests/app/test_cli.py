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
