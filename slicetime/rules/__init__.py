"""Rules layer: one small function per check, bound to its code in
:mod:`slicetime.rules.bindings`. No I/O.

The codes themselves are declared in the catalogue (:mod:`slicetime.codes`), which is
complete without this package.
"""

from slicetime.rules.bindings import check_dataset, check_run
from slicetime.rules.registry import (
    RULES,
    DatasetHit,
    Hit,
    Rule,
    explain,
    fold_consequences,
    folded_entry,
    folds_into,
)

__all__ = ["RULES", "DatasetHit", "Hit", "Rule", "check_dataset", "check_run", "explain",
           "fold_consequences", "folded_entry", "folds_into"]
