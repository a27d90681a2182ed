"""Table: what intake hands to the rest of the core.

A Table holds, for one uploaded file, the sample ids, the metadata columns
(text or grouping columns, never analysed) and the numeric matrix of
variables (rows are samples, columns are variables, NaN marks a missing
value), plus the units found under the header.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import pandas as pd

from analysis.errors import InputError


@dataclass(frozen=True)
class Table:
    """Sample ids, metadata and numeric variables of one dataset.

    Attributes
    ----------
    data : pandas.DataFrame of shape (n_samples, n_variables)
        float64 values, index = sample ids (str), columns = variable names.
    metadata : pandas.DataFrame of shape (n_samples, n_metadata)
        Text (object) columns, same index as ``data``.
    units : dict[str, str]
        Unit per variable where the file gave one.
    id_column : str or None
        Name of the column the ids came from; None when ids were generated
        from row numbers.
    """

    data: pd.DataFrame
    metadata: pd.DataFrame
    units: dict[str, str] = field(default_factory=dict)
    id_column: str | None = None

    def __post_init__(self) -> None:
        if not self.data.index.equals(self.metadata.index):
            raise ValueError("data and metadata must share the same sample index")

    @property
    def sample_ids(self) -> list[str]:
        return [str(s) for s in self.data.index]

    @property
    def variables(self) -> list[str]:
        return [str(c) for c in self.data.columns]

    @property
    def metadata_columns(self) -> list[str]:
        return [str(c) for c in self.metadata.columns]

    @property
    def n_samples(self) -> int:
        return self.data.shape[0]

    @property
    def n_variables(self) -> int:
        return self.data.shape[1]

    @property
    def values(self) -> np.ndarray:
        """The numeric matrix as a float64 ndarray (a copy)."""
        return self.data.to_numpy(dtype=np.float64, copy=True)

    def without_samples(self, sample_ids) -> Table:
        """A new Table without the given samples; unknown ids are an InputError."""
        drop = [str(s) for s in sample_ids]
        unknown = sorted(set(drop) - set(self.sample_ids))
        if unknown:
            raise InputError(f"unknown sample id(s) to exclude: {', '.join(unknown[:10])}")
        keep = ~self.data.index.isin(drop)
        return Table(self.data.loc[keep], self.metadata.loc[keep], dict(self.units), self.id_column)

    def select_variables(self, names) -> Table:
        """A new Table with only the named variables, in the given order."""
        names = [str(n) for n in names]
        unknown = [n for n in names if n not in self.data.columns]
        if unknown:
            raise InputError(f"unknown variable(s): {', '.join(unknown[:10])}")
        units = {k: v for k, v in self.units.items() if k in names}
        return Table(self.data[names], self.metadata, units, self.id_column)
