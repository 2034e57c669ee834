"""Campaigns and the work in them, one module per concern; the public functions are re-exported here."""

from __future__ import annotations

from .assignment import Task, held_tasks, lease_tasks
from .checks import check_answers, examples, set_check_answer, set_example
from .groups import (
    GroupCounts,
    GroupingSummary,
    GroupResult,
    GroupTask,
    Undone,
    crop_entities,
    group_counts,
    has_groups,
    held_group,
    lease_group,
    make_groups,
    save_group_label,
    skip_group,
    undo_last_submission,
)
from .judgments import judgments, raw_labels, region_classes
from .labelling import region_visible_to, save_label, skip_region, undo_last
from .plans import PlanInfo, StratumInfo, plan_of, sample_of, strata_of
from .progress import (
    AnnotatorProgress,
    ClassProgress,
    campaign_progress,
    labels_done,
    person_progress,
    skips_version,
)
from .records import (
    CampaignInfo,
    Entities,
    create_campaign,
    get_campaign,
    list_campaigns,
    run_classes,
    update_campaign,
)
from .redundancy import RedundancyCounts, close_class, redundancy_counts, refresh_quotas
from .synonym_rules import (
    RuleRow,
    add_synonym_rule,
    delete_synonym_rule,
    synonym_rule_rows,
    synonym_rules,
)
from .vocabulary import label_counts, recount_words

__all__ = [
    "PlanInfo",
    "RedundancyCounts",
    "StratumInfo",
    "close_class",
    "plan_of",
    "redundancy_counts",
    "refresh_quotas",
    "sample_of",
    "strata_of",
    "AnnotatorProgress",
    "CampaignInfo",
    "ClassProgress",
    "GroupCounts",
    "GroupResult",
    "GroupTask",
    "Undone",
    "crop_entities",
    "undo_last_submission",
    "GroupingSummary",
    "Entities",
    "RuleRow",
    "Task",
    "add_synonym_rule",
    "group_counts",
    "has_groups",
    "held_group",
    "held_tasks",
    "lease_group",
    "make_groups",
    "save_group_label",
    "skip_group",
    "region_visible_to",
    "campaign_progress",
    "check_answers",
    "create_campaign",
    "delete_synonym_rule",
    "examples",
    "get_campaign",
    "judgments",
    "label_counts",
    "labels_done",
    "lease_tasks",
    "list_campaigns",
    "person_progress",
    "raw_labels",
    "recount_words",
    "region_classes",
    "run_classes",
    "save_label",
    "set_check_answer",
    "set_example",
    "skip_region",
    "skips_version",
    "synonym_rule_rows",
    "synonym_rules",
    "undo_last",
    "update_campaign",
]
