"""Respondent screening of a stored dataset (``analysis.screening`` on ``ingest.load_table``).

Every variable of the dataset is an item, in file order. ``items="auto"`` asks
``analysis.screening.check_item_scale`` whether they look like items on one
scale and refuses (``NotItemScale``, with the rule and the offending column)
when they do not; ``items="declared"`` takes the user's word that they are and
screens anyway, noting what the check would have said. The result is one row
per respondent with the indices, the flags and the flags in words, which the
API returns and the dataset page's screening tab shows. Nothing is stored: an
exclusion goes through the review (``webapp.services.review``) as any other.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from analysis import screening as core
from analysis.errors import InputError
from webapp.services import ingest

ITEM_MODES = ("auto", "declared")
FLAG_WORDS = {"long_string_flag": "long string", "irv_flag": "low IRV", "distance_flag": "robust distance"}
REASON_CATEGORY = "careless response"  # webapp.services.review_rules.REASON_CATEGORIES
COLUMNS = ("sample_id", "answered", "long_string", "mean_run", "irv", "distance_sq", "distance_df",
           "distance_cutoff", *FLAG_WORDS, "n_flags", "flags")


class NotItemScale(InputError):
    """The variables do not look like items on one scale and the user did not declare them (API: 422)."""


@dataclass
class DatasetScreening:
    """The screening of one dataset: its id, how the items were taken (``ITEM_MODES``), the items, the result."""

    dataset_id: int
    items: str
    item_names: list[str]
    result: core.Screening

    @property
    def table(self) -> pd.DataFrame:
        """One row per respondent (``COLUMNS``), ``flags`` the flags in words ('' for none)."""
        frame = self.result.table.reset_index()
        frame["flags"] = flag_words(frame)
        return frame[list(COLUMNS)]

    def summary(self) -> dict[str, Any]:
        """What the table rests on: the scale check, the cut-offs with their basis, notes, counts."""
        scale = self.result.scale
        counts = self.result.table[list(FLAG_WORDS)].sum()
        return {
            "dataset_id": self.dataset_id,
            "items": self.items,
            "n_items": len(self.item_names),
            "item_names": self.item_names,
            "scale": {"looks_like_items": scale.is_items, "low": scale.low, "high": scale.high,
                      "reason": scale.reason, "rule": core.SCALE_RULE},
            "cutoffs": [{"name": c.name, "value": c.value, "rule": c.rule, "basis": c.basis}
                        for c in self.result.cutoffs],
            "flag_counts": {FLAG_WORDS[k]: int(v) for k, v in counts.items()},
            "n_respondents": int(self.result.table.shape[0]),
            "n_flagged": len(self.result.flagged),
            "notes": list(self.result.notes),
            "reason_category": REASON_CATEGORY,
        }


def flag_words(frame: pd.DataFrame) -> list[str]:
    """Per row, its flags in words joined by '; ' ('' when none)."""
    marks = [np.where(frame[column].to_numpy(dtype=bool), word, "") for column, word in FLAG_WORDS.items()]
    return ["; ".join(word for word in row if word) for row in zip(*marks)]


def check_mode(items: str | None) -> str:
    """'auto' (also for None or '') or 'declared'; InputError naming ``items`` otherwise."""
    mode = (items or "auto").strip().lower()
    if mode not in ITEM_MODES:
        raise InputError(f"'items' must be 'auto' or 'declared', got {items!r}", field="items")
    return mode


def screen_dataset(dataset_id: int, items: str | None = "auto") -> DatasetScreening:
    """Screen the respondents of ``dataset_id`` (``DatasetNotFound``, ``NotItemScale``, InputError)."""
    mode = check_mode(items)
    table = ingest.load_table(int(dataset_id))
    data = table.data
    names = [str(c) for c in data.columns]
    scale = core.check_item_scale(data.to_numpy(dtype=np.float64), names)
    if mode == "auto" and not scale.is_items:
        raise NotItemScale(
            f"dataset {dataset_id}: the variables do not look like items on one scale ({scale.reason}). "
            "If they are, declare it (items=declared; on the page, tick 'Treat the variables as items on one scale').",
            field="items",
        )
    if data.shape[1] < 2:
        raise InputError(f"dataset {dataset_id} has {data.shape[1]} variable(s); screening needs at least 2 items")
    result = core.screen(data)
    if mode == "declared" and not scale.is_items:
        result.notes.insert(0, f"Declared as items on one scale, although the check says otherwise: {scale.reason}.")
    return DatasetScreening(int(dataset_id), mode, names, result)
