"""Control limits of the monitoring charts at a warning and an action level.

Every chart has a warning and an action limit. Score charts are two-sided
with centre line 0; the T², SPE and combined-index charts are one-sided,
their centre line the median of the statistic's reference distribution
(common practice).

References
----------
Tracy, N.D., Young, J.C., Mason, R.L. (1992) Multivariate control charts for
    individual observations. Journal of Quality Technology 24(2), 88-95;
    NIST/SEMATECH e-Handbook of Statistical Methods, section 6.5.4.3.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from analysis import diagnostics
from analysis.errors import InputError
from analysis.pca import PCAModel

DEFAULT_CONFIDENCE_LEVELS = (0.95, 0.99)  # warning, action (common practice)
MEDIAN = 0.5  # confidence of the centre line of one-sided charts
LEVELS = ("warning", "action")


@dataclass(frozen=True)
class ChartLimits:
    """Limits of one control chart.

    ``warning`` / ``action`` are the upper limits; ``lower_warning`` /
    ``lower_action`` exist on two-sided charts (scores) only. ``centre`` is
    the centre line: 0 for scores, the median of the reference distribution
    for T², SPE and the combined index (common practice), None when unknown.
    """

    warning: float
    action: float
    centre: float | None = None
    lower_warning: float | None = None
    lower_action: float | None = None

    def __post_init__(self):
        values = [self.warning, self.action, self.centre, self.lower_warning, self.lower_action]
        if not all(v is None or (isinstance(v, (int, float, np.floating)) and math.isfinite(v)) for v in values):
            raise InputError(f"chart limits must be finite numbers, got {values}")
        if (self.lower_warning is None) != (self.lower_action is None):
            raise InputError("a two-sided chart needs both a lower warning and a lower action limit")
        if self.warning > self.action:
            raise InputError(f"warning limit {self.warning} lies beyond the action limit {self.action}")
        if self.two_sided and self.lower_warning < self.lower_action:
            raise InputError(
                f"lower warning limit {self.lower_warning} lies beyond the lower action limit {self.lower_action}"
            )

    @property
    def two_sided(self) -> bool:
        return self.lower_action is not None

    def upper(self, level: str) -> float:
        return self.action if level == "action" else self.warning

    def lower(self, level: str) -> float | None:
        return self.lower_action if level == "action" else self.lower_warning


def check_confidence_levels(confidence_levels) -> tuple[float, float]:
    """(warning, action) as floats; InputError unless 0 < warning < action < 1."""
    try:
        warning, action = confidence_levels
    except (TypeError, ValueError) as exc:
        raise InputError(
            f"confidence_levels={confidence_levels!r} must be two levels (warning, action), e.g. (0.95, 0.99)"
        ) from exc
    warning, action = diagnostics.check_confidence(warning), diagnostics.check_confidence(action)
    if warning >= action:
        raise InputError(f"the warning level {warning} must be below the action level {action}")
    return warning, action


def score_limits(model: PCAModel, component: int, confidence_levels=DEFAULT_CONFIDENCE_LEVELS) -> ChartLimits:
    """Two-sided limits of the score chart of one component (0-based) for new samples.

    The new-observation T² of a single component (Tracy, Young & Mason 1992
    with A = 1) gives t_a^2 / lambda_a ~ ((n+1)/n) F(1, n-1), so the limits
    are +-sqrt(lambda_a * T2_limit(n, 1)), i.e. +-sqrt(lambda_a (n+1)/n)
    t_{n-1, (1+c)/2}; centre line 0.
    """
    levels = check_confidence_levels(confidence_levels)
    a = int(component)
    if not 0 <= a < model.n_components_:
        raise InputError(f"component {component!r} is not one of the model's {model.n_components_} components")
    lam = float(model.eigenvalues_[a])
    warning, action = (math.sqrt(lam * diagnostics.t2_limit(model.n_samples_, 1, c, new=True)) for c in levels)
    return ChartLimits(warning, action, 0.0, -warning, -action)
