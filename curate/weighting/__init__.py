"""Weighting: policies, selections, the weighted table, and the groups that holdouts split by.

``policy`` loads and hashes a weighting policy; ``weights`` turns grades into least-squares
weights (pure); ``selection`` chooses dataset versions in one pass; ``table`` builds the
weighted long table from the ledger; ``splitters`` and ``groupings`` make holdout folds.
"""

from __future__ import annotations

from curate.weighting.policy import Policy, PolicyLike, load_policy, resolve_policy
from curate.weighting.selection import Selection, select
from curate.weighting.table import WeightedTable, weighted_table
from curate.weighting.weights import WeightSummary

__all__ = [
    "Policy",
    "PolicyLike",
    "Selection",
    "WeightSummary",
    "WeightedTable",
    "load_policy",
    "resolve_policy",
    "select",
    "weighted_table",
]
