"""Phase II monitoring: new samples checked against a frozen reference model.

A reference model is a fitted ``PCAModel`` (or one read back from its open
model file). New samples are scored with the model's own code path, so the
numbers here equal ``PCAModel.transform`` / ``hotelling_t2`` / ``spe`` (and so
the offline ``latentdesk apply``) to the last bit. The modules, each with the
references of its methods:

- ``limits``: warning and action levels, chart limits, score-chart limits;
- ``scoring``: scores, T², SPE and their limits for new samples
  (``score_new_samples``), with the optional combined index of Yue & Qin;
- ``contributions``: reconstruction-based contributions
  (``reconstruction_contributions``);
- ``run_rules``: run rules on a chart's sequence of values (``check_run_rules``);
- ``ewma_charts``: EWMA of one series and the multivariate EWMA of the scores
  (``ewma``, ``mewma``, ``mewma_limit``);
- ``explanation``: a plain-language sentence for one new sample
  (``explain_new_sample``).

Every public name is re-exported here: ``from analysis import monitoring as
mon; mon.score_new_samples(...)``.

References
----------
MacGregor, J.F., Kourti, T. (1995) Statistical process control of
    multivariate processes. Control Engineering Practice 3(3), 403-414.
"""

from analysis.monitoring.limits import (
    DEFAULT_CONFIDENCE_LEVELS,
    LEVELS,
    MEDIAN,
    ChartLimits,
    check_confidence_levels,
    score_limits,
)
from analysis.monitoring.scoring import NewSampleScores, combined_index, score_new_samples
from analysis.monitoring.contributions import (
    RBC_DIRECTION_TOL,
    ReconstructionContributions,
    reconstruction_contributions,
)
from analysis.monitoring.run_rules import (
    DEFAULT_RULES,
    RULE_TYPES,
    BeyondLimit,
    KOfMBeyond,
    RuleViolation,
    RunOneSide,
    Trend,
    check_run_rules,
    longest_window,
    rule_from_config,
    rules_from_config,
)
from analysis.monitoring.ewma_charts import (
    MEWMA_BLOCK,
    MEWMA_HORIZON,
    MEWMA_RUNS,
    EwmaChart,
    MewmaChart,
    check_lambda,
    ewma,
    mewma,
    mewma_limit,
    new_sample_t2_moments,
)
from analysis.monitoring.explanation import explain_new_sample

__all__ = [
    "combined_index",
    # limits
    "DEFAULT_CONFIDENCE_LEVELS",
    "LEVELS",
    "MEDIAN",
    "ChartLimits",
    "check_confidence_levels",
    "score_limits",
    # scoring
    "NewSampleScores",
    "score_new_samples",
    # contributions
    "RBC_DIRECTION_TOL",
    "ReconstructionContributions",
    "reconstruction_contributions",
    # run_rules
    "DEFAULT_RULES",
    "RULE_TYPES",
    "BeyondLimit",
    "KOfMBeyond",
    "RuleViolation",
    "RunOneSide",
    "Trend",
    "check_run_rules",
    "longest_window",
    "rule_from_config",
    "rules_from_config",
    # ewma
    "MEWMA_BLOCK",
    "MEWMA_HORIZON",
    "MEWMA_RUNS",
    "EwmaChart",
    "MewmaChart",
    "check_lambda",
    "ewma",
    "mewma",
    "mewma_limit",
    "new_sample_t2_moments",
    # explanation
    "explain_new_sample",
]
