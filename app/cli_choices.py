"""The fixed choices the command line offers, as plain values: building the parser (and `heedmap --help`)
imports none of numpy, pandas, SQLAlchemy or torch. A test holds each to the constant it copies."""

from __future__ import annotations

METHODS = ("majority", "dawid-skene", "one-coin")  # analysis.reliability.METHODS
ROLES = ("annotator", "reviewer", "analyst", "admin")  # app.models.ROLES
FORMATS = ("csv", "json", "parquet")  # analysis.exports.FORMATS
FILLS = ("blur", "mean", "inpaint", "ring")  # analysis.interventions.FILLS
DEFAULT_FILLS = ("ring",)  # analysis.interventions.DEFAULT_FILLS
DEFAULT_MAX_CANDIDATES = 2_000_000  # analysis.rule_budget.DEFAULT_MAX_CANDIDATES
CORRECTIONS = ("holm", "bh")  # the keys of analysis.reliance.CORRECTIONS
VERDICT_DEFAULTS = {"min_effect": 0.05, "alpha": 0.05, "correction": "holm"}  # analysis.reliance.VerdictSettings()
CUES = ("tag", "belt", "object", "patch", "none")  # demo_data.scenes.CUES
