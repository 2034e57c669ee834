"""Hostile or odd input to the commands: one line on stderr and exit 1, never a traceback; CSV out is quoted."""

from __future__ import annotations

import csv
import io
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
from fastapi.testclient import TestClient
from scipy import sparse

from analysis.errors import InvalidInputError
from analysis.expectations import read_expectations
from analysis.itemsets import count_itemsets
from analysis.questions import QuestionError, parse_question
from analysis.rule_budget import candidate_bound
from app.cli import main

from .conftest import join, label_some


def _fails_cleanly(argv: list[str], capsys: pytest.CaptureFixture[str], *words: str, lines: int = 1) -> None:
    assert main(argv) == 1, argv
    err = capsys.readouterr().err
    assert "Traceback" not in err and err.startswith("heedmap: ") and err.count("\n") == lines, err
    for w in words:
        assert w in err, (w, err)


def test_ragged_and_non_utf8_csv_files_name_the_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "ragged.csv").write_text("cls,tag\ncan,1,0\nbottle,0,1\n")  # more fields than the header on every row
    _fails_cleanly(["rules", str(tmp_path / "ragged.csv"), "--target", "cls"], capsys, "line 2 has 3 fields")
    (tmp_path / "latin1.csv").write_bytes("cls,étiquette\ncan,1\n".encode("latin-1"))
    _fails_cleanly(["rules", str(tmp_path / "latin1.csv"), "--target", "cls"], capsys, "not UTF-8", "line 1")
    (tmp_path / "gold.csv").write_bytes("item,label\nr1,carré\n".encode("latin-1"))
    (tmp_path / "labels.csv").write_text("item,annotator,label\nr1,a,can\nr1,b,can\n")
    _fails_cleanly(["aggregate", str(tmp_path / "labels.csv"), "--known", str(tmp_path / "gold.csv")], capsys, "not UTF-8", "line 2")


def test_checks_refuse_odd_region_ids(project: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["campaign", str(project), "--name", "c"]) == 0
    capsys.readouterr()
    for bad in ("²", str(10**20), "-1", "1e3"):
        (tmp_path / "k.csv").write_text(f"region,answer\n{bad},cap\n", encoding="utf-8")
        _fails_cleanly(["checks", str(project), "--campaign", "1", str(tmp_path / "k.csv")], capsys, "line 2", "region must be")
    (tmp_path / "k.csv").write_bytes("region,answer\n1,bouchon rougeâtre\n".encode("latin-1"))
    _fails_cleanly(["checks", str(project), "--campaign", "1", str(tmp_path / "k.csv")], capsys, "not UTF-8")


def test_csv_output_is_quoted(project: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "labels.csv").write_text('item,annotator,label\n"r1, left",a,"can, crushed"\n"r1, left",b,"can, crushed"\nr2,a,"say ""hi"""\n')
    assert main(["aggregate", str(tmp_path / "labels.csv"), "--method", "majority"]) == 0
    lines = capsys.readouterr().out.splitlines()
    rows = list(csv.reader(io.StringIO("\n".join(lines[1:]))))
    assert rows[0] == ["item", "label", "probability", "ratings"]
    assert {r[0]: r[1] for r in rows[1:]} == {"r1, left": "can, crushed", "r2": 'say "hi"'}
    assert main(["invite", str(project), "--name", "kim", "--note", 'night shift, "B" line']) == 0
    capsys.readouterr()
    assert main(["invite", str(project), "--list"]) == 0
    listed = list(csv.DictReader(io.StringIO(capsys.readouterr().out)))
    assert listed[0]["note"] == 'night shift, "B" line' and listed[0]["person"] == "kim"


class _ClosedPipe(io.StringIO):
    def write(self, s: str) -> int:
        raise BrokenPipeError(32, "Broken pipe")


def test_a_closed_pipe_ends_quietly(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "labels.csv").write_text("item,annotator,label\n" + "".join(f"r{i},a,{'can' if i % 3 else 'bottle'}\nr{i},b,can\n" for i in range(50)))
    monkeypatch.setattr(sys, "stdout", _ClosedPipe())
    assert main(["aggregate", str(tmp_path / "labels.csv"), "--method", "majority"]) == 141  # what a shell reports for SIGPIPE
    assert capsys.readouterr().err == ""


def test_a_real_pipe_closed_by_head_prints_nothing_on_stderr(tmp_path: Path) -> None:
    (tmp_path / "labels.csv").write_text("item,annotator,label\n" + "".join(f"r{i},a,{'can' if i % 3 else 'bottle'}\nr{i},b,can\n" for i in range(20000)))
    with subprocess.Popen([sys.executable, "-m", "app.cli", "aggregate", str(tmp_path / "labels.csv"), "--method", "majority"],
                          stdout=subprocess.PIPE, stderr=subprocess.PIPE) as proc:
        assert proc.stdout is not None and proc.stderr is not None
        proc.stdout.readline()
        proc.stdout.close()  # what `| head -1` does
        err = proc.stderr.read().decode()
        proc.wait(timeout=120)
    assert "Traceback" not in err and "BrokenPipe" not in err, err


def test_rules_refuse_settings_that_would_count_millions_of_sets(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    """3,000 concept columns over 50 images once ran four minutes and took 4 GB; now refused before mining."""
    rng = np.random.default_rng(0)
    cells = rng.integers(0, 2, size=(50, 3000))
    header = "cls," + ",".join(f"c{j}" for j in range(3000))
    rows = [f"{'can' if i % 2 else 'bottle'}," + ",".join(map(str, row)) for i, row in enumerate(cells)]
    (tmp_path / "wide.csv").write_text(header + "\n" + "\n".join(rows) + "\n")
    _fails_cleanly(["rules", str(tmp_path / "wide.csv"), "--target", "cls"], capsys, "max_len", "min_count", "past the limit")


def test_candidate_bound_holds_against_counted_sets() -> None:
    """Invariant: the sets that reach min_count (counted by the miner) never outnumber the bound."""
    rng = np.random.default_rng(1)
    for min_count, max_len, density in ((1, 2, 0.3), (2, 3, 0.4), (5, 2, 0.6), (3, 1, 0.5)):
        x = (rng.random((40, 12)) < density).astype(np.int8)
        y = rng.integers(0, 3, 40)
        counts = count_itemsets(sparse.csr_matrix(x), y, n_classes=3, min_count=min_count, max_len=max_len)
        reached = int((counts.class_counts >= min_count).sum())
        assert 0 < reached <= candidate_bound(x.sum(axis=1), min_count=min_count, max_len=max_len)
    assert candidate_bound([3, 2], min_count=1, max_len=2) == (3 + 3) + (2 + 1)  # C(3,1)+C(3,2) + C(2,1)+C(2,2)


def test_nesting_is_bounded_in_expectations_and_questions(tmp_path: Path) -> None:
    deep = "[classes.can]\nrelies_on = " + "[" * 20_000 + "]" * 20_000 + "\n"
    with pytest.raises(InvalidInputError, match="nested more than"):
        read_expectations(deep)
    ok = read_expectations('# a [comment [[[[[[[[[[ with brackets\n[classes.can]\nrelies_on = [\'"label [[[[[[[[[[band" and tag\']\n')
    assert len(ok.items) == 1 and "label [[[[[[[[[[band" in ok.items[0].question
    with pytest.raises(QuestionError, match="nests more than"):
        parse_question("(" * 400 + "tag" + ")" * 400)
    with pytest.raises(QuestionError, match="nests more than"):
        parse_question("not " * 400 + "tag")
    assert parse_question("(" * 10 + "tag" + ")" * 10).name == "tag"  # type: ignore[union-attr]


def test_deep_nesting_gets_a_message_from_the_pages_and_the_commands(client: TestClient, project: Path, campaign_id: int, tmp_path: Path,
                                                                     capsys: pytest.CaptureFixture[str]) -> None:
    label_some(project, campaign_id)
    csrf = join(client, "ed", role="analyst")
    deep = "[classes.can]\nrelies_on = " + "[" * 20_000 + "]" * 20_000 + "\n"
    r = client.post(f"/campaigns/{campaign_id}/expectations", data={"csrf": csrf, "text": deep[:49_000]})
    assert r.status_code == 422 and "nested more than" in r.text
    r = client.get(f"/campaigns/{campaign_id}/ask", params={"q": "(" * 400 + "tag" + ")" * 400})
    assert r.status_code == 422 and "nests more than" in r.text
    (tmp_path / "deep.toml").write_text(deep)
    _fails_cleanly(["check", str(project), str(tmp_path / "deep.toml")], capsys, "nested more than")
    _fails_cleanly(["ask", str(project), "(" * 400 + "tag" + ")" * 400], capsys, "nests more than", lines=3)  # the message, the question, a caret


def test_serve_with_a_warming_count_out_of_range_says_so_before_serving(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    project = tmp_path / "p"
    assert main(["init", str(project)]) == 0
    capsys.readouterr()
    _fails_cleanly(["serve", str(project), "--warm-campaigns", "-1"], capsys, "warm_campaigns must be 0..20", "-1")
