"""Review records: check evaluation, sign-offs and their staleness, comments, the audit trail.

No Qt here. Importing the package registers the table of metric keys with the model's
validator (see :mod:`stagewise.review.metrics`).
"""

from stagewise.review import metrics as _metrics  # noqa: F401  (registers the metric keys)
