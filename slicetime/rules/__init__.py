"""Rules layer: one small registered function per check. No I/O.

Importing this package registers every rule in :data:`RULES`.
"""

from slicetime.rules import (  # noqa: F401  (registration)
    batch,
    correction,
    dataset,
    header,
    policy,
    reading,
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
)

__all__ = ["RULES", "DatasetHit", "Hit", "Rule", "check_dataset", "check_run", "explain"]
