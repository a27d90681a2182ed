"""The wine recognition data shipped with scikit-learn, as an upload for API tests.

Source: Aeberhard, Coomans & de Vel (1992), UCI Machine Learning Repository
"Wine"; distributed as ``sklearn.datasets.load_wine`` (178 samples, 13 numeric
variables, 3 cultivars). Sample ids and the cultivar column are added here.
"""

from __future__ import annotations

import pandas as pd
from sklearn.datasets import load_wine


def wine_frame() -> pd.DataFrame:
    """Columns: ``sample`` (W-001 ...), ``cultivar`` (text), then the 13 variables."""
    bunch = load_wine(as_frame=True)
    frame = bunch.data.copy()
    frame.insert(0, "cultivar", [f"cultivar {t + 1}" for t in bunch.target])
    frame.insert(0, "sample", [f"W-{i + 1:03d}" for i in range(len(frame))])
    return frame


def wine_csv(frame: pd.DataFrame | None = None) -> bytes:
    frame = wine_frame() if frame is None else frame
    return frame.to_csv(index=False).encode("utf-8")


def variables() -> list[str]:
    return list(load_wine().feature_names)
