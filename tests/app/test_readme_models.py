"""README "Bring your own model": every example runs as written, in order, in one folder.

The user's pieces are stood in for: ``model`` is our plain-torch ResNet-18 (torchvision's layout and
key names), ``mymodels.nets.SorterNet`` is the same class, and ``photos/test/<class>/`` holds a few
seeded noise images. Python blocks run with ``model`` and ``torch`` defined; a Python block whose first
line is a comment naming a ``.py`` file is written to that file instead; every ``heedmap`` line of a
shell block runs through the command line in-process and must succeed.
"""

from __future__ import annotations

import re
import shlex
import sys
from pathlib import Path

import numpy as np
import pytest
import torch
from PIL import Image
from sqlalchemy import select

from analysis.architectures import ResNet18
from app.cli import main
from app.db import make_engine, session_factory
from app.models import SaliencyRun

README = Path(__file__).resolve().parents[2] / "README.md"
_BLOCK = re.compile(r"```(python|shell)\n(.*?)```", re.S)


def _section() -> str:
    text = README.read_text()
    start = text.index("## Bring your own model")
    return text[start : text.index("\n## ", start + 1)]


def test_readme_model_examples_cover_every_format() -> None:
    blocks = _BLOCK.findall(_section())
    commands = "\n".join(body for lang, body in blocks if lang == "shell")
    code = "\n".join(body for lang, body in blocks if lang == "python")
    for needed in ("--model model.pt2", "--model model.pt ", "--model-factory", '"architecture"'):
        assert needed in commands + code, f"README 'Bring your own model' has no worked example with {needed}"


@pytest.mark.slow
def test_readme_model_examples_run_as_written(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.chdir(tmp_path)
    rng = np.random.default_rng(0)
    for cls in ("cat", "dog", "fox"):
        (tmp_path / "photos" / "test" / cls).mkdir(parents=True)
        for i in range(2):
            Image.fromarray(rng.integers(0, 256, (120, 160, 3), dtype=np.uint8)).save(tmp_path / "photos" / "test" / cls / f"{i}.png")
    (tmp_path / "mymodels").mkdir()
    (tmp_path / "mymodels" / "__init__.py").write_text("")
    (tmp_path / "mymodels" / "nets.py").write_text("from analysis.architectures import ResNet18 as SorterNet  # noqa: F401\n")
    for mod in [m for m in sys.modules if m == "mymodels" or m.startswith("mymodels.")]:
        monkeypatch.delitem(sys.modules, mod)
    torch.manual_seed(0)
    namespace: dict[str, object] = {"model": ResNet18(3).eval(), "torch": torch}
    ran = 0
    for lang, body in _BLOCK.findall(_section()):
        first = body.splitlines()[0]
        if lang == "python" and (target := re.match(r"# ([\w/]+\.py)\b", first)):
            (tmp_path / target.group(1)).write_text(body)
            continue
        if lang == "python":
            exec(compile(body, str(README), "exec"), namespace)  # noqa: S102 - the README's own example
            continue
        for line in body.splitlines():
            if line.startswith("heedmap "):
                code = main(shlex.split(line)[1:])
                assert code == 0, f"README command failed: {line}\n{capsys.readouterr().err}"
                ran += 1
    assert ran >= 6
    engine = make_engine(tmp_path / "proj")
    with session_factory(engine)() as s:
        runs = {str(r.provenance["run_name"]): r for r in s.scalars(select(SaliencyRun))}
    engine.dispose()
    assert set(runs) == {"test", "test-torchscript", "test-factory", "test-resnet18"}
    kinds = {name: run.provenance["model_kind"] for name, run in runs.items()}
    assert kinds == {"test": "exported", "test-torchscript": "torchscript", "test-factory": "factory", "test-resnet18": "state_dict"}
    for mod in [m for m in sys.modules if m == "mymodels" or m.startswith("mymodels.")]:
        monkeypatch.delitem(sys.modules, mod)
