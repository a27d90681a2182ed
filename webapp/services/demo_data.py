"""Invented demo datasets: a lab scenario (with three later weeks) and a survey scenario.

Both are generated here from a seeded latent-variable model, so the demo
has real correlation structure for PCA and a known set of planted problems
that a reviewer should find. Every name (product, sites, lines, departments,
items) is invented. The same seed always gives identical bytes.

Which samples carry the planted problems depends only on the scenario's
fixed design, never on the seed; ``planted_anomalies`` lists them with their
causes so tests and docs can check that the app flags them.

Only numpy and pandas are used; nothing here touches the web app.
"""

from __future__ import annotations

import io

import numpy as np
import pandas as pd

LAB_SEED = 20261201
SURVEY_SEED = 20261202

# The production schedule (which line made which batch) is part of the
# scenario's design, drawn once from this fixed seed so it never moves
# with the value seed.
_SCHEDULE_SEED = 7

LAB_FILENAME = "demo_lab_batches.csv"
SURVEY_FILENAME = "demo_staff_survey.csv"

# ---------------------------------------------------------------- lab

_N_BATCHES = 150
_LINE_SITE = {"Line A": "Site North", "Line B": "Site North", "Line C": "Site South"}
_LINE_WEIGHTS = {"Line A": 0.36, "Line B": 0.32, "Line C": 0.32}
_FIRST_DAY = "2026-01-05"
_LOD_IMPURITY_B = 0.05
_LOST_RESULTS = 15  # empty assay cells (about 1 %)

# name, mean, standard deviation, decimals, loadings on the three latent
# factors (granulation, degradation, suspension rheology), in SD units.
_ASSAYS = [
    ("Assay (%)", 99.8, 0.7, 1, (0.0, -0.60, 0.0)),
    ("Impurity A (%)", 0.15, 0.03, 3, (0.0, 0.75, 0.0)),
    ("Impurity B (%)", 0.085, 0.018, 3, (0.0, 0.60, 0.0)),
    ("Total impurities (%)", 0.42, 0.06, 2, (0.0, 0.85, 0.0)),
    ("Water content (%)", 2.4, 0.25, 2, (0.85, 0.0, 0.0)),
    ("pH", 6.5, 0.12, 2, (0.0, 0.0, 0.80)),
    ("Viscosity (mPa·s)", 340.0, 25.0, 0, (0.20, 0.0, 0.75)),
    ("Particle size D50 (µm)", 180.0, 15.0, 0, (0.90, 0.0, 0.0)),
    ("Dissolution 30 min (%)", 88.0, 3.0, 1, (-0.80, 0.0, 0.0)),
    ("Bulk density (g/mL)", 0.55, 0.03, 3, (0.75, 0.0, 0.0)),
]
LAB_VARIABLES = [a[0] for a in _ASSAYS]
LAB_METADATA = ["Site", "Line", "Manufactured"]

# Planted problems, placed by the position of a batch in the schedule.
_MISLABEL_B_RANK = 20  # the 20th Line B batch is written down as Line A
_ASSAY_OUTLIER_A_RANK = 25  # 25th Line A batch: assay low, impurities normal
_DISSOLUTION_OUTLIER_C_RANK = 12  # 12th Line C batch: dissolution low alone
_EXTREME_A_RANK = 40  # 40th Line A batch: far along the granulation factor
_DRIFT_BATCHES = 15  # the last 15 batches of Site South
_DRIFT_TOTAL = 1.2  # water content reads 1.2 % high by the last of them
_LINE_B_SHIFT = {"pH": 0.25, "Viscosity (mPa·s)": 45.0}
_ASSAY_DROP = 4.5
_DISSOLUTION_DROP = 18.0
_EXTREME_GRANULATION = 5.0  # latent SD units


def _batch_id(i: int) -> str:
    return f"B26-{i + 1:03d}"


def _lab_schedule() -> tuple[list[str], pd.DatetimeIndex]:
    """Line per batch in run order and the manufacturing dates (fixed design)."""
    rng = np.random.default_rng(_SCHEDULE_SEED)
    lines = list(_LINE_WEIGHTS)
    weights = np.array(list(_LINE_WEIGHTS.values()))
    schedule = [str(s) for s in rng.choice(lines, size=_N_BATCHES, p=weights / weights.sum())]
    dates = pd.bdate_range(_FIRST_DAY, periods=_N_BATCHES)
    return schedule, dates


def _nth(schedule: list[str], line: str, rank: int) -> int:
    """Row index of the rank-th (1-based) batch made on a line."""
    return [i for i, s in enumerate(schedule) if s == line][rank - 1]


def _lab_design() -> dict:
    schedule, dates = _lab_schedule()
    south = [i for i, s in enumerate(schedule) if _LINE_SITE[s] == "Site South"]
    return {
        "schedule": schedule,
        "dates": dates,
        "mislabelled": _nth(schedule, "Line B", _MISLABEL_B_RANK),
        "assay_outlier": _nth(schedule, "Line A", _ASSAY_OUTLIER_A_RANK),
        "dissolution_outlier": _nth(schedule, "Line C", _DISSOLUTION_OUTLIER_C_RANK),
        "extreme": _nth(schedule, "Line A", _EXTREME_A_RANK),
        "drift": south[-_DRIFT_BATCHES:],
    }


def _lab_frame(seed: int) -> pd.DataFrame:
    design = _lab_design()
    schedule = design["schedule"]
    rng = np.random.default_rng(seed)
    n, p = _N_BATCHES, len(_ASSAYS)
    means = np.array([a[1] for a in _ASSAYS])
    sds = np.array([a[2] for a in _ASSAYS])
    loadings = np.array([a[4] for a in _ASSAYS])  # (p, 3)
    unique = np.sqrt(1.0 - (loadings**2).sum(axis=1))

    factors = rng.standard_normal((n, 3))
    factors[design["extreme"]] = [_EXTREME_GRANULATION, 0.3, -0.2]
    # Keep the mislabelled batch a typical Line B batch, so its true line is
    # recognisable whatever the seed.
    factors[design["mislabelled"], 2] = 0.5
    noise = rng.standard_normal((n, p))
    values = means + sds * (factors @ loadings.T + unique * noise)

    col = {name: j for j, name in enumerate(LAB_VARIABLES)}
    for i, line in enumerate(schedule):
        if line == "Line B":
            for name, shift in _LINE_B_SHIFT.items():
                values[i, col[name]] += shift
    for k, i in enumerate(design["drift"], start=1):
        values[i, col["Water content (%)"]] += _DRIFT_TOTAL * k / _DRIFT_BATCHES
    values[design["assay_outlier"], col["Assay (%)"]] -= _ASSAY_DROP
    values[design["dissolution_outlier"], col["Dissolution 30 min (%)"]] -= _DISSOLUTION_DROP

    cells = [[f"{v:.{a[3]}f}" for v, a in zip(row, _ASSAYS)] for row in values]
    for i in range(n):
        if values[i, col["Impurity B (%)"]] < _LOD_IMPURITY_B:
            cells[i][col["Impurity B (%)"]] = f"<{_LOD_IMPURITY_B:g}"

    # A few lost results, never on a planted batch.
    planted = {design["mislabelled"], design["assay_outlier"], design["dissolution_outlier"],
               design["extreme"], *design["drift"]}
    candidates = [(i, j) for i in range(n) if i not in planted for j in range(p)]
    for k in rng.choice(len(candidates), size=_LOST_RESULTS, replace=False):
        i, j = candidates[k]
        cells[i][j] = ""

    labels = list(schedule)
    labels[design["mislabelled"]] = "Line A"
    frame = pd.DataFrame(cells, columns=LAB_VARIABLES)
    frame.insert(0, "Batch", [_batch_id(i) for i in range(n)])
    frame.insert(1, "Site", [_LINE_SITE[s] for s in schedule])
    frame.insert(2, "Line", labels)
    frame.insert(3, "Manufactured", [d.strftime("%Y-%m-%d") for d in design["dates"]])
    return frame


def lab_scenario(seed: int = LAB_SEED) -> tuple[str, bytes]:
    """Invented lab scenario: 150 batches x 10 assays of a granulate for oral suspension.

    Rows are batches in run order ("Batch" first, then Site, Line and the
    manufacturing date); columns are assays with their units in the name.
    Values come from three latent factors (granulation, degradation,
    suspension rheology) plus noise. A few Impurity B results are written
    "<0.05" (below detection limit) and about 15 cells are empty. The
    planted problems are listed by ``planted_anomalies("lab")``.

    Returns
    -------
    (filename, csv_bytes) : UTF-8 CSV, comma delimited, point decimal.
    """
    return LAB_FILENAME, _to_csv(_lab_frame(int(seed)))



# ------------------------------------------------- lab: later batches
# Three invented weeks of production after the 150 training batches, drawn
# from the same latent model (means, SDs, loadings, Line B shift) with a
# random stream of their own per week, so they check against a reference
# model fitted on the lab scenario.

LAB_LATER_FILENAMES = ("demo_lab_week_1.csv", "demo_lab_week_2.csv", "demo_lab_week_3.csv")
_LATER_SIZES = (12, 12, 16)
_LATER_ASSAY_FAULT_POSITION = 6  # 7th batch of week 2: assay reads low alone
_LATER_ASSAY_FAULT = 4.5  # percentage points, as the training data's assay outlier
# Week 3: the degradation factor creeps up batch by batch (latent SD units),
# a slow drift along the model's own structure that stays inside the limits.
_LATER_DRIFT_START, _LATER_DRIFT_END = 0.4, 2.2


def _later_design(week: int) -> tuple[list[str], int]:
    """(line per batch, index of its first batch in the continuing run) of week 1, 2 or 3."""
    rng = np.random.default_rng(_SCHEDULE_SEED + 10 * week)
    lines = list(_LINE_WEIGHTS)
    weights = np.array(list(_LINE_WEIGHTS.values()))
    schedule = [str(s) for s in rng.choice(lines, size=_LATER_SIZES[week - 1], p=weights / weights.sum())]
    return schedule, _N_BATCHES + sum(_LATER_SIZES[: week - 1])


def _later_frame(seed: int, week: int) -> pd.DataFrame:
    schedule, first = _later_design(week)
    n, p = len(schedule), len(_ASSAYS)
    rng = np.random.default_rng([seed, week])
    means = np.array([a[1] for a in _ASSAYS])
    sds = np.array([a[2] for a in _ASSAYS])
    loadings = np.array([a[4] for a in _ASSAYS])
    unique = np.sqrt(1.0 - (loadings**2).sum(axis=1))
    factors = rng.standard_normal((n, 3))
    if week == 3:
        factors[:, 1] = np.linspace(_LATER_DRIFT_START, _LATER_DRIFT_END, n) + 0.25 * rng.standard_normal(n)
    values = means + sds * (factors @ loadings.T + unique * rng.standard_normal((n, p)))
    col = {name: j for j, name in enumerate(LAB_VARIABLES)}
    for i, line in enumerate(schedule):
        if line == "Line B":
            for name, shift in _LINE_B_SHIFT.items():
                values[i, col[name]] += shift
    if week == 2:
        values[_LATER_ASSAY_FAULT_POSITION, col["Assay (%)"]] -= _LATER_ASSAY_FAULT
    cells = [[f"{v:.{a[3]}f}" for v, a in zip(row, _ASSAYS)] for row in values]
    for i in range(n):
        if values[i, col["Impurity B (%)"]] < _LOD_IMPURITY_B:
            cells[i][col["Impurity B (%)"]] = f"<{_LOD_IMPURITY_B:g}"
    dates = pd.bdate_range(_FIRST_DAY, periods=_N_BATCHES + sum(_LATER_SIZES))[first:first + n]
    frame = pd.DataFrame(cells, columns=LAB_VARIABLES)
    frame.insert(0, "Batch", [_batch_id(first + i) for i in range(n)])
    frame.insert(1, "Site", [_LINE_SITE[s] for s in schedule])
    frame.insert(2, "Line", schedule)
    frame.insert(3, "Manufactured", [d.strftime("%Y-%m-%d") for d in dates])
    return frame


def lab_later_batches(seed: int = LAB_SEED) -> list[tuple[str, bytes]]:
    """Three invented later weeks of the lab scenario, to check against its reference model.

    Same columns, units and intake quirks ("<0.05") as ``lab_scenario``; batch
    ids continue the training run (B26-151 on). Week 1 is in control, week 2
    has one batch with an assay fault, week 3 a slow upward drift of the
    degradation products (see ``lab_later_findings``).

    Returns
    -------
    [(filename, csv_bytes)] for weeks 1, 2 and 3, UTF-8 CSV.
    """
    return [(name, _to_csv(_later_frame(int(seed), week)))
            for week, name in enumerate(LAB_LATER_FILENAMES, start=1)]


def lab_later_findings() -> dict:
    """What a reviewer should find in each later week, keyed by file name.

    Each value holds ``samples`` (the planted batch ids, empty for week 1),
    ``variables``, ``cause`` and ``finding``. The ids do not depend on the seed.
    """
    _, fault_first = _later_design(2)
    _, drift_first = _later_design(3)
    return {
        LAB_LATER_FILENAMES[0]: {
            "samples": [], "variables": [],
            "cause": "a normal week of production",
            "finding": "no T² or SPE value beyond the action limit and no run rule: nothing to disposition",
        },
        LAB_LATER_FILENAMES[1]: {
            "samples": [_batch_id(fault_first + _LATER_ASSAY_FAULT_POSITION)],
            "variables": ["Assay (%)"],
            "cause": f"assay fault: the result reads {_LATER_ASSAY_FAULT:g} % low while impurities are normal",
            "finding": "SPE beyond the action limit; Assay (%) leads the reconstruction-based SPE "
                       "contributions",
        },
        LAB_LATER_FILENAMES[2]: {
            "samples": [_batch_id(drift_first + i) for i in range(_LATER_SIZES[2])],
            "variables": ["Assay (%)", "Impurity A (%)", "Impurity B (%)", "Total impurities (%)"],
            "cause": "degradation creeps up batch by batch (impurities rise, assay falls) "
                     "along the direction the model already knows",
            "finding": "no T² or SPE value crosses the action limit, yet run rules fire on the "
                       "continuing charts before any single point does",
        },
    }

# ------------------------------------------------------------- survey

_N_RESPONDENTS = 320
_TRAITS = ["workload", "support", "clarity", "tools"]
_TRAIT_CORRELATION = 0.35
# Form order; the fourth item of each trait is negatively worded.
# column name, trait, loading on its trait, threshold shift
_ITEMS = [
    ("Q01 Manageable workload", "workload", 0.80, 0.4),
    ("Q02 Colleagues help out", "support", 0.80, 0.2),
    ("Q03 Expectations are clear", "clarity", 0.80, 0.4),
    ("Q04 Tools work reliably", "tools", 0.75, 0.5),
    ("Q05 Tasks fit in normal hours", "workload", 0.75, 0.6),
    ("Q06 Often left on my own", "support", -0.70, -1.2),
    ("Q07 Priorities are explained", "clarity", 0.75, 0.6),
    ("Q08 Equipment I need is there", "tools", 0.80, 0.4),
    ("Q09 Often under time pressure", "workload", -0.70, -0.9),
    ("Q10 Team shares information", "support", 0.75, 0.4),
    ("Q11 Goals stay stable", "clarity", 0.70, 0.7),
    ("Q12 Time lost to broken tools", "tools", -0.70, -1.1),
    ("Q13 Breaks when I need them", "workload", 0.70, 0.3),
    ("Q14 Lead gives advice", "support", 0.75, 0.3),
    ("Q15 Often unsure what to do", "clarity", -0.70, -1.3),
    ("Q16 Systems support my work", "tools", 0.75, 0.6),
]
SURVEY_VARIABLES = [item[0] for item in _ITEMS]
SURVEY_METADATA = ["Department", "Mode", "Submitted"]
_PAGE_TWO = SURVEY_VARIABLES[8:]
# Cut points on the latent response scale for answers 1..5 (agree-leaning,
# as in most staff surveys).
_CUTS = np.array([-1.7, -0.9, 0.0, 1.0])

_DEPARTMENTS = ["Planning", "Workshop", "Customer Care", "Logistics"]
# Department differences in trait means (latent SD units): small, real.
_DEPARTMENT_EFFECT = {
    "Planning": {"clarity": 0.3},
    "Workshop": {"tools": -0.6},
    "Customer Care": {"workload": -0.5},
    "Logistics": {},
}
_PAPER_SHARE = 0.2
_SKIPPED_ANSWERS = 90  # blank answers (about 2 %)
_FIRST_SUBMISSION = "2026-10-05"
# Straight-liners by respondent position and their one repeated answer.
_STRAIGHT_LINERS = {36: 5, 144: 5, 233: 1, 290: 3}
# The paper forms of one print run had the scale printed in reverse on
# page two (Q09-Q16); those respondents answered in good faith.
_REVERSED_BLOCK = range(250, 266)


def _respondent_id(i: int) -> str:
    return f"R{i + 1:03d}"


def _survey_design() -> dict:
    rng = np.random.default_rng(_SCHEDULE_SEED + 1)
    departments = [str(d) for d in rng.choice(_DEPARTMENTS, size=_N_RESPONDENTS)]
    paper = rng.random(_N_RESPONDENTS) < _PAPER_SHARE
    for i in _REVERSED_BLOCK:  # one print run went to Logistics
        departments[i] = "Logistics"
        paper[i] = True
    day = pd.bdate_range(_FIRST_SUBMISSION, periods=15)
    submitted = day[np.sort(rng.integers(0, len(day), size=_N_RESPONDENTS))]
    return {"departments": departments, "paper": paper, "submitted": submitted}


def _survey_frame(seed: int) -> pd.DataFrame:
    design = _survey_design()
    rng = np.random.default_rng(seed)
    n, k = _N_RESPONDENTS, len(_TRAITS)
    corr = np.full((k, k), _TRAIT_CORRELATION) + (1 - _TRAIT_CORRELATION) * np.eye(k)
    traits = rng.standard_normal((n, k)) @ np.linalg.cholesky(corr).T
    for i, dept in enumerate(design["departments"]):
        for trait, effect in _DEPARTMENT_EFFECT[dept].items():
            traits[i, _TRAITS.index(trait)] += effect

    answers = np.empty((n, len(_ITEMS)), dtype=np.int64)
    for j, (_, trait, loading, shift) in enumerate(_ITEMS):
        latent = loading * traits[:, _TRAITS.index(trait)]
        latent += np.sqrt(1 - loading**2) * rng.standard_normal(n) + shift
        answers[:, j] = 1 + np.searchsorted(_CUTS, latent)

    page_two = [SURVEY_VARIABLES.index(c) for c in _PAGE_TWO]
    for i in _REVERSED_BLOCK:
        answers[i, page_two] = 6 - answers[i, page_two]
    for i, answer in _STRAIGHT_LINERS.items():
        answers[i, :] = answer

    cells = answers.astype(str).astype(object)
    planted = set(_STRAIGHT_LINERS) | set(_REVERSED_BLOCK)
    candidates = [(i, j) for i in range(n) if i not in planted for j in range(len(_ITEMS))]
    for c in rng.choice(len(candidates), size=_SKIPPED_ANSWERS, replace=False):
        i, j = candidates[c]
        cells[i, j] = ""

    frame = pd.DataFrame(cells, columns=SURVEY_VARIABLES)
    frame.insert(0, "Respondent", [_respondent_id(i) for i in range(n)])
    frame.insert(1, "Department", design["departments"])
    frame.insert(2, "Mode", ["paper" if p else "online" for p in design["paper"]])
    frame.insert(3, "Submitted", [d.strftime("%Y-%m-%d") for d in design["submitted"]])
    return frame


def survey_scenario(seed: int = SURVEY_SEED) -> tuple[str, bytes]:
    """Invented staff survey: 320 respondents x 16 Likert items (1-5).

    Four latent traits (workload, support, clarity, tools), four items each,
    mixed on the form; the fourth item of each trait is negatively worded.
    Metadata: Department, Mode (online / paper) and the submission date.
    About 90 answers are blank. The planted problems are listed by
    ``planted_anomalies("survey")``.

    Returns
    -------
    (filename, csv_bytes) : UTF-8 CSV, comma delimited.
    """
    return SURVEY_FILENAME, _to_csv(_survey_frame(int(seed)))


# ------------------------------------------------------------- shared

def _to_csv(frame: pd.DataFrame) -> bytes:
    buffer = io.StringIO()
    frame.to_csv(buffer, index=False, lineterminator="\n")
    return buffer.getvalue().encode("utf-8")


def planted_anomalies(scenario: str) -> dict:
    """The planted problems of a scenario ("lab" or "survey") and their causes.

    Returns a dict keyed by problem name; each value holds ``samples`` (ids),
    ``variables`` (the columns involved), ``cause`` (what happened) and
    ``finding`` (what a reviewer should see in the app). The ids do not
    depend on the seed.
    """
    if scenario == "lab":
        return _lab_anomalies()
    if scenario == "survey":
        return _survey_anomalies()
    raise ValueError(f"unknown demo scenario {scenario!r}; choose 'lab' or 'survey'")


def _lab_anomalies() -> dict:
    d = _lab_design()
    return {
        "assay_outlier": {
            "samples": [_batch_id(d["assay_outlier"])],
            "variables": ["Assay (%)"],
            "cause": "sample preparation error: assay reads 4.5 % low while impurities are normal",
            "finding": "SPE far above the limit; Assay (%) dominates the SPE contributions",
        },
        "dissolution_outlier": {
            "samples": [_batch_id(d["dissolution_outlier"])],
            "variables": ["Dissolution 30 min (%)"],
            "cause": "dissolution run fault: result 18 points low with normal particle size and water",
            "finding": "SPE far above the limit; Dissolution 30 min (%) dominates the SPE contributions",
        },
        "extreme_valid": {
            "samples": [_batch_id(d["extreme"])],
            "variables": ["Water content (%)", "Particle size D50 (µm)",
                          "Dissolution 30 min (%)", "Bulk density (g/mL)"],
            "cause": "documented process trial at the coarse end of the granulation range; "
                     "every assay moved the way the process predicts",
            "finding": "Hotelling's T2 above the limit but SPE under it: extreme, yet consistent",
        },
        "drifting_instrument": {
            "samples": [_batch_id(i) for i in d["drift"]],
            "variables": ["Water content (%)"],
            "cause": "the Site South water-content instrument drifts upward, "
                     f"reading up to {_DRIFT_TOTAL} % high over its last {_DRIFT_BATCHES} batches",
            "finding": "SPE rises with run order at Site South; Water content (%) leads the "
                       "contributions of the last batches",
        },
        "line_shift": {
            "samples": [_batch_id(i) for i, s in enumerate(d["schedule"]) if s == "Line B"],
            "variables": list(_LINE_B_SHIFT),
            "cause": "Line B runs systematically higher on pH and viscosity",
            "finding": "coloured by Line, the Line B batches sit apart on a component "
                       "loading on pH and viscosity",
        },
        "mislabelled_batch": {
            "samples": [_batch_id(d["mislabelled"])],
            "variables": list(_LINE_B_SHIFT),
            "cause": "made on Line B but recorded as Line A",
            "finding": "labelled Line A, yet its scores sit among the Line B batches",
        },
    }


def _survey_anomalies() -> dict:
    return {
        "straight_liners": {
            "samples": [_respondent_id(i) for i in _STRAIGHT_LINERS],
            "variables": list(SURVEY_VARIABLES),
            "cause": "the same answer to every item, including the negatively worded ones "
                     f"(answers: {', '.join(str(a) for a in _STRAIGHT_LINERS.values())})",
            "finding": "respondents answering 5, 4 or 1 throughout have SPE above the limit, "
                       "led by the negatively worded items; the one answering 3 throughout "
                       "sits near the centre and is found only by its zero spread",
        },
        "reversed_page_two": {
            "samples": [_respondent_id(i) for i in _REVERSED_BLOCK],
            "variables": list(_PAGE_TWO),
            "cause": "one print run of the paper form (Logistics) showed the scale reversed "
                     "on page two (Q09-Q16)",
            "finding": "most of the block has SPE above the limit, with contributions on both "
                       "pages because the pages disagree; coloured by Mode and Department they are "
                       "all paper forms from Logistics, submitted together",
        },
    }
