"""Public entry point kept for outside checks: ``from rfisieve.sk import sk_thresholds``.

The kurtosis detector lives in :mod:`rfisieve.detect.kurtosis`; this module only
re-exports its threshold functions (the signature is a contract, docs/design.md).
"""

from rfisieve.detect.kurtosis import (  # noqa: F401
    METHODS, gaussian_tail, sk_estimator, sk_threshold_table, sk_thresholds,
    sk_thresholds_sigma,
)
