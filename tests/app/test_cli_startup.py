"""The command line starts without the heavy libraries, and its fixed choices are the ones the code accepts."""

from __future__ import annotations

import json
import subprocess
import sys

from analysis.exports import FORMATS
from analysis.interventions import DEFAULT_FILLS, FILLS
from analysis.reliability import METHODS
from analysis.reliance import CORRECTIONS, VerdictSettings
from analysis.rule_budget import DEFAULT_MAX_CANDIDATES
from app import cli_choices
from app.models import ROLES
from demo_data.scenes import CUES


def test_choices_are_the_constants_they_copy() -> None:
    assert cli_choices.METHODS == METHODS
    assert cli_choices.ROLES == ROLES
    assert cli_choices.FORMATS == FORMATS
    assert cli_choices.FILLS == FILLS
    assert cli_choices.DEFAULT_MAX_CANDIDATES == DEFAULT_MAX_CANDIDATES
    assert cli_choices.DEFAULT_FILLS == DEFAULT_FILLS
    assert cli_choices.CORRECTIONS == tuple(CORRECTIONS)
    d = VerdictSettings()
    assert cli_choices.VERDICT_DEFAULTS == {"min_effect": d.min_effect, "alpha": d.alpha, "correction": d.correction}
    assert cli_choices.CUES == CUES


def test_help_imports_no_heavy_library() -> None:
    code = ("import sys, contextlib, io\nfrom app.cli import main\n"
            "with contextlib.redirect_stdout(io.StringIO()):\n    try:\n        main(['--help'])\n    except SystemExit:\n        pass\n"
            "import json; print(json.dumps(sorted(m for m in sys.modules if m.split('.')[0] in "
            "('numpy', 'pandas', 'scipy', 'sqlalchemy', 'torch', 'fastapi', 'captum', 'PIL'))))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert json.loads(done.stdout.strip().splitlines()[-1]) == []


def test_every_command_still_has_its_help() -> None:
    from app.cli import _parser

    sub = next(a for a in _parser()._actions if a.dest == "command")
    names = set(sub.choices)  # type: ignore[arg-type]
    assert {"ask", "check", "export", "report", "interventions", "rules", "agreement", "aggregate", "campaign", "saliency"} <= names
