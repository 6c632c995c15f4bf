"""Rules layer: one small registered function per check. No I/O.

Importing this package registers every rule in :data:`RULES`.
"""

import slicetime.policy.checks  # registration of the policy/* codes
import slicetime.policy.loading  # registration of policy/invalid
import slicetime.readers.codes  # noqa: F401  (registration of the readers codes)
from slicetime.rules import (  # noqa: F401  (registration)
    batch,
    correction,
    dataset,
    header,
    naming,
    source,
    timing,
    verify,
)
from slicetime.rules.registry import (
    RULES,
    DatasetHit,
    Hit,
    Rule,
    check_dataset,
    check_run,
    explain,
    fold_consequences,
    folded_entry,
    folds_into,
)

__all__ = ["RULES", "DatasetHit", "Hit", "Rule", "check_dataset", "check_run", "explain",
           "fold_consequences", "folded_entry", "folds_into"]
