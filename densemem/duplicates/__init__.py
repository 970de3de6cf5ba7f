"""Near-duplicate groups: a plan (groups, keep and drop lists) that the user applies; inputs are never touched."""

from ._find import DedupSpec, DuplicateGroup, DuplicatePlan, plan_duplicates

__all__ = ["DedupSpec", "DuplicateGroup", "DuplicatePlan", "plan_duplicates"]
