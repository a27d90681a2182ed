"""The settings of one PCA fit as one typed, validated, immutable object.

Every way in (pages, JSON API, command line, saved views, proposals) hands a
mapping of settings to :meth:`FitSettings.parse`, which checks each field
against the dataset and puts it in canonical form: ``variables`` in the
dataset's column order, ``log10`` and ``exclude`` sorted and de-duplicated.
What reaches the fingerprint, the cache and the record is always a
``FitSettings``; ``to_dict`` gives the JSON form stored and shown.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any, Mapping

from analysis.errors import InputError
from analysis.preprocessing import SCALINGS

DEFAULT_CONFIDENCE = 0.95
AUTO = "auto"
CLASSICAL, ROBUST = "classical", "robust"
METHODS = (CLASSICAL, ROBUST)  # classical PCA, or ROBPCA (analysis.robust)
FIELDS = ("scaling", "components", "variables", "log10", "exclude", "confidence", "method")


@dataclass(frozen=True)
class FitSettings:
    """Validated fit settings.

    Attributes
    ----------
    scaling : {"none", "center", "autoscale", "pareto"}
    components : int >= 1 or "auto" (the recommendation of ``analysis.rank``)
    variables : tuple of str, in the dataset's column order
    log10 : tuple of str, sorted; each one of ``variables``
    exclude : tuple of str, sorted sample ids left out of the fit
    confidence : float in (0, 1), the level of the limits shown
    method : {"classical", "robust"}
        Classical PCA (``analysis.pca``), or ROBPCA (Hubert, Rousseeuw & Vanden
        Branden 2005; ``analysis.robust``) whose limits are the score- and
        orthogonal-distance cut-offs
    """

    scaling: str = "autoscale"
    components: int | str = AUTO
    variables: tuple[str, ...] = ()
    log10: tuple[str, ...] = ()
    exclude: tuple[str, ...] = ()
    confidence: float = DEFAULT_CONFIDENCE
    method: str = CLASSICAL

    @classmethod
    def parse(cls, settings: Mapping[str, Any] | FitSettings, dataset_variables: list[str]) -> FitSettings:
        """Check ``settings`` against the dataset's variables; InputError names the
        setting and the value that is wrong. An empty or absent ``variables``
        means every variable of the dataset."""
        if isinstance(settings, FitSettings):
            settings = settings.to_dict()
        if not isinstance(settings, Mapping):
            raise InputError(f"the fit settings must be an object of named settings, got {settings!r}")
        unknown = sorted(set(settings) - set(FIELDS))
        if unknown:
            raise InputError(f"unknown setting(s): {', '.join(map(str, unknown))}; allowed: {', '.join(FIELDS)}",
                             field=str(unknown[0]))
        scaling = settings.get("scaling", "autoscale")
        if scaling not in SCALINGS:
            raise InputError(f"'scaling' must be one of {', '.join(SCALINGS)}, got {scaling!r}", field="scaling")
        chosen = set(_names(settings.get("variables"), "variables"))
        missing = sorted(chosen - set(dataset_variables))
        if missing:
            raise InputError(f"unknown variable(s) in 'variables': {', '.join(missing[:10])}", field="variables")
        variables = tuple(v for v in dataset_variables if v in chosen) if chosen else tuple(dataset_variables)
        log10 = tuple(sorted(set(_names(settings.get("log10"), "log10"))))
        not_used = [v for v in log10 if v not in variables]
        if not_used:
            raise InputError(f"'log10' names variable(s) not in the model: {', '.join(not_used[:10])}", field="log10")
        return cls(
            scaling=scaling,
            components=_components(settings.get("components", AUTO)),
            variables=variables,
            log10=log10,
            exclude=tuple(sorted(set(_names(settings.get("exclude"), "exclude")))),
            confidence=_confidence(settings.get("confidence", DEFAULT_CONFIDENCE)),
            method=_method(settings.get("method", CLASSICAL)),
        )

    def replace(self, **changes: Any) -> FitSettings:
        """A copy with some fields changed (not re-validated: use for values this
        object already holds, such as another confidence level or exclusion list
        of the same dataset)."""
        if "exclude" in changes:
            changes["exclude"] = tuple(sorted(set(map(str, changes["exclude"]))))
        if "confidence" in changes:
            changes["confidence"] = _confidence(changes["confidence"])
        return dataclasses.replace(self, **changes)

    def to_dict(self) -> dict[str, Any]:
        """The JSON form stored with a model record and shown by the API."""
        return {
            "scaling": self.scaling,
            "components": self.components,
            "variables": list(self.variables),
            "log10": list(self.log10),
            "exclude": list(self.exclude),
            "confidence": self.confidence,
            "method": self.method,
        }


def _names(value: Any, name: str) -> list[str]:
    if value is None:
        return []
    if isinstance(value, str) or not isinstance(value, (list, tuple)):
        raise InputError(f"'{name}' must be a list of names, got {value!r:.80}", field=name)
    return [str(v) for v in value]


def _components(value: Any) -> int | str:
    if isinstance(value, str) and value.strip().isascii() and value.strip().isdigit():
        value = int(value)
    if value == AUTO:
        return AUTO
    if isinstance(value, bool) or not isinstance(value, int) or value < 1:
        raise InputError(f"'components' must be a whole number of at least 1 or \"auto\", got {value!r:.80}",
                         field="components")
    return value


def _method(value: Any) -> str:
    if value is None:
        return CLASSICAL
    if value not in METHODS:
        raise InputError(f"'method' must be one of {', '.join(METHODS)}, got {value!r:.80}", field="method")
    return value


def _confidence(value: Any) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value < 1:
        raise InputError(f"'confidence' must be a number between 0 and 1 (e.g. 0.95), got {value!r:.80}",
                         field="confidence")
    return float(value)
