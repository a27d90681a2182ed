"""View state <-> query string, and the one place that builds page URLs.

A dataset page's whole state (model settings and what is shown) lives in its
query string, so a reload, the back button or a copied link shows the same
thing. ``ViewState`` is that state; ``to_query`` writes only what differs from
the defaults, in a fixed key order; ``parse_query`` reads it back, ignoring
values it cannot use and saying which. Lists (log10 variables, variables left
out, excluded samples) are repeated keys, so names may hold commas.

Components are numbered from 1 in the URL (``pcx=1`` is PC1), as on the axes.
"""

from __future__ import annotations

from dataclasses import dataclass, replace
from typing import Any, Mapping
from urllib.parse import parse_qs, quote, urlencode

TABS = ("variance", "scores", "loadings", "diagnostics", "screening", "outliers")
SCALINGS = ("autoscale", "center", "pareto", "none")
LOADING_VIEWS = ("plot", "biplot", "bars")
CONFIDENCES = (0.9, 0.95, 0.99)
METHODS = ("classical", "robust")  # webapp.services.fit_settings.METHODS


@dataclass(frozen=True)
class ViewState:
    """What a dataset page shows.

    Model settings: ``components`` (None = use the recommendation), ``scaling``,
    ``log10`` (variables log-transformed), ``drop`` (variables left out),
    ``exclude`` (sample ids left out of the fit), ``include_all`` (with no
    ``exclude``: every sample in the fit, rather than the dataset's approved
    exclusions; how a saved view made with nothing excluded keeps its word),
    ``confidence``, ``method`` (classical PCA or robust ROBPCA).
    View: ``tab``, ``pcx``/``pcy`` (1-based components), ``colour``/``shape``
    (metadata columns), ``labels``, ``loadings`` (plot, biplot or bars),
    ``sample`` (the sample whose explanation is open), ``order`` (column for the
    control charts' x axis; None = sample order).
    """

    components: int | None = None
    scaling: str = "autoscale"
    log10: tuple[str, ...] = ()
    drop: tuple[str, ...] = ()
    exclude: tuple[str, ...] = ()
    include_all: bool = False
    confidence: float = 0.95
    method: str = "classical"
    tab: str = "scores"
    pcx: int = 1
    pcy: int = 2
    colour: str | None = None
    shape: str | None = None
    labels: bool = False
    loadings: str = "plot"
    sample: str | None = None
    order: str | None = None

    def model_settings(self, variables: list[str]) -> dict[str, Any]:
        """Settings for ``webapp.services.modelling.get_model``: what decides the fit.

        ``variables`` are all of the dataset's variables; those in ``drop`` are
        left out. Everything else in the state only changes the picture.
        """
        dropped = set(self.drop)
        kept = [v for v in variables if v not in dropped]
        return {
            "scaling": self.scaling,
            "components": self.components if self.components is not None else "auto",
            "variables": kept,
            "log10": [v for v in self.log10 if v not in dropped],
            # No exclude in the link: the dataset's approved exclusions apply (webapp.services.review),
            # unless include=all says "none left out".
            "exclude": list(self.exclude) if self.exclude or self.include_all else None,
            "confidence": self.confidence,
            "method": self.method,
        }

    def with_changes(self, **changes) -> ViewState:
        """A copy with some fields changed (lists given as any iterable)."""
        for key in ("log10", "drop", "exclude"):
            if key in changes and changes[key] is not None:
                changes[key] = _unique(changes[key])
        return replace(self, **changes)


# URL key for each field, in the order they are written.
_KEYS = {
    "tab": "tab", "components": "a", "scaling": "scaling", "log10": "log10", "drop": "drop",
    "exclude": "exclude", "include_all": "include", "confidence": "conf", "method": "method", "pcx": "pcx", "pcy": "pcy",
    "colour": "colour", "shape": "shape", "labels": "labels", "loadings": "loadings", "sample": "sample",
    "order": "order",
}
_LIST_FIELDS = ("log10", "drop", "exclude")
INCLUDE_ALL = "all"  # include=all: no sample left out, whatever is approved
# Not part of the view state: names the saved view whose selection the dataset page starts with.
VIEW_KEY = "view"
DEFAULT = ViewState()


def _unique(values) -> tuple[str, ...]:
    seen: dict[str, None] = {}
    for v in values:
        if str(v) != "":
            seen.setdefault(str(v), None)
    return tuple(seen)


def to_query(state: ViewState) -> str:
    """Query string (without '?') holding every field that differs from the default."""
    pairs: list[tuple[str, str]] = []
    for name, key in _KEYS.items():
        value = getattr(state, name)
        if value == getattr(DEFAULT, name):
            continue
        if name in _LIST_FIELDS:
            pairs.extend((key, v) for v in value)
        elif name == "include_all":
            pairs.append((key, INCLUDE_ALL))
        elif isinstance(value, bool):
            pairs.append((key, "1" if value else "0"))
        elif isinstance(value, float):
            pairs.append((key, f"{value:g}"))
        else:
            pairs.append((key, str(value)))
    return urlencode(pairs, quote_via=quote)


def _as_lists(query: str | Mapping[str, Any] | None) -> dict[str, list[str]]:
    """Normalise a raw query string, or Dash's layout(**query) dict, to key -> list of values."""
    if query is None:
        return {}
    if isinstance(query, str):
        return parse_qs(query.lstrip("?"), keep_blank_values=True)
    out: dict[str, list[str]] = {}
    for key, value in query.items():
        out[key] = [str(v) for v in value] if isinstance(value, (list, tuple)) else [str(value)]
    return out


def parse_query(query: str | Mapping[str, Any] | None) -> tuple[ViewState, list[str]]:
    """The ViewState a query string describes, and a note for each value ignored.

    Unknown keys are left alone (other parts of the app may add their own); a
    known key with an unusable value keeps the default and is named in the notes.
    """
    raw = _as_lists(query)
    values: dict[str, Any] = {}
    notes: list[str] = []

    def first(name: str) -> str | None:
        got = raw.get(_KEYS[name])
        return got[-1] if got else None

    def bad(name: str, text: str, expected: str) -> None:
        notes.append(f"ignored {_KEYS[name]}={text!r} in the link: expected {expected}")

    for name in _LIST_FIELDS:
        if _KEYS[name] in raw:
            values[name] = _unique(raw[_KEYS[name]])

    for name, lowest in (("components", 1), ("pcx", 1), ("pcy", 1)):
        text = first(name)
        if text is None or (name == "components" and text in ("", "auto")):
            continue
        try:
            number = int(text)
        except ValueError:
            number = 0
        if number < lowest:
            bad(name, text, f"a whole number of at least {lowest}")
        else:
            values[name] = number

    text = first("confidence")
    if text is not None:
        try:
            conf = float(text)
        except ValueError:
            conf = -1.0
        if 0.5 <= conf < 1.0:
            values["confidence"] = conf
        else:
            bad("confidence", text, "a level between 0.5 and 1, such as 0.95")

    for name, allowed in (("tab", TABS), ("scaling", SCALINGS), ("method", METHODS), ("loadings", LOADING_VIEWS)):
        text = first(name)
        if text is None:
            continue
        if text in allowed:
            values[name] = text
        else:
            bad(name, text, "one of " + ", ".join(allowed))

    text = first("labels")
    if text is not None:
        if text in ("1", "0", "true", "false"):
            values["labels"] = text in ("1", "true")
        else:
            bad("labels", text, "1 or 0")

    text = first("include_all")
    if text is not None:
        if text == INCLUDE_ALL:
            values["include_all"] = True
        else:
            bad("include_all", text, INCLUDE_ALL)

    for name in ("colour", "shape", "sample", "order"):
        text = first(name)
        if text:
            values[name] = text

    state = replace(DEFAULT, **values)
    if state.pcx == state.pcy:
        notes.append(f"pcx and pcy were both {state.pcx}; showing PC1 against PC2")
        state = replace(state, pcx=1, pcy=2)
    return state, notes


def from_query(query: str | Mapping[str, Any] | None) -> ViewState:
    """The ViewState a query string describes (see ``parse_query``)."""
    return parse_query(query)[0]


# ------------------------------------------------------------------ URLs
def _path_part(value) -> str:
    return quote(str(value), safe="")


def home_url() -> str:
    """The dataset list."""
    return "/"


def upload_url() -> str:
    """The upload page (file -> intake report -> confirm)."""
    return "/upload"


def dataset_path_template() -> str:
    """Path template of the dataset page (for dash.register_page)."""
    return "/datasets/<dataset_id>"


def page_query(state: ViewState | None = None, view_id: str | None = None) -> str:
    """A dataset page's query string: the view state, then ``view=<id>`` when the page
    was opened from a saved view (its selection is restored, ``webapp.services.views``)."""
    query = to_query(state) if state is not None else ""
    if not view_id:
        return query
    named = urlencode([(VIEW_KEY, str(view_id))], quote_via=quote)
    return f"{query}&{named}" if query else named


def view_id_from_query(query: str | Mapping[str, Any] | None) -> str | None:
    """The saved view a dataset page's query string names (``view=<id>``), or None."""
    values = [v for v in _as_lists(query).get(VIEW_KEY, []) if v]
    return values[-1] if values else None


def dataset_url(dataset_id, state: ViewState | None = None, view_id: str | None = None) -> str:
    """The dataset page, optionally in a given view state and with a saved view's selection."""
    path = f"/datasets/{_path_part(dataset_id)}"
    query = page_query(state, view_id)
    return f"{path}?{query}" if query else path


# -- review pages (owner: REVIEW) -----------------------------------------------
def review_url(dataset_id=None) -> str:
    """The reviewer queue, optionally for one dataset."""
    return f"/review?{urlencode({'dataset': dataset_id})}" if dataset_id is not None else "/review"


def propose_url(dataset_id, samples=(), action: str = "exclude", state: ViewState | None = None) -> str:
    """The proposal form for samples of a dataset (the dataset page's selection),
    fitted with the model settings of ``state``."""
    pairs = [("dataset", str(dataset_id)), ("action", action)] + [("sample", str(s)) for s in samples]
    query = urlencode(pairs, quote_via=quote)
    # The page's explained sample is not carried: its key, ``sample``, lists the samples proposed here.
    settings = to_query(replace(state, sample=None)) if state is not None else ""
    return f"/review/propose?{query}&{settings}" if settings else f"/review/propose?{query}"


def review_log_url(dataset_id, **filters) -> str:
    """A dataset's review log page; filters: action, actor (both optional)."""
    pairs = [("dataset", str(dataset_id))] + [(k, str(v)) for k, v in filters.items() if v not in (None, "")]
    return f"/review/log?{urlencode(pairs, quote_via=quote)}"


def signoff_report_url(dataset_id, proposal_id=None) -> str:
    """The printable sign-off report (HTML) of a dataset, or of one proposal."""
    path = f"/-/review/datasets/{_path_part(dataset_id)}/report"
    return f"{path}?proposal={_path_part(proposal_id)}" if proposal_id is not None else path


def signoff_report_pdf_url(dataset_id, proposal_id=None) -> str:
    """The sign-off report of a dataset, or of one proposal, as a PDF file."""
    path = f"/-/review/datasets/{_path_part(dataset_id)}/report.pdf"
    return f"{path}?proposal={_path_part(proposal_id)}" if proposal_id is not None else path


def review_log_csv_url(dataset_id) -> str:
    return f"/api/v1/datasets/{_path_part(dataset_id)}/review-log.csv"


def views_url(dataset_id=None) -> str:
    """The saved views list, optionally for one dataset."""
    return f"/views?{urlencode({'dataset': dataset_id})}" if dataset_id is not None else "/views"


def view_url(view_id) -> str:
    """A saved view's shareable link."""
    return f"/views/{_path_part(view_id)}"


def absolute_url(url_root: str, path: str) -> str:
    """``path`` (one of the links above) as a full address under ``url_root``, the
    scheme, host and mount point the request came in on (Flask's ``request.url_root``)."""
    return url_root.rstrip("/") + "/" + path.lstrip("/")


def save_view_url(dataset_id, state: ViewState | None = None, selection=()) -> str:
    """The form that saves a dataset page's state (and selection) as a named view."""
    pairs = [("save", "1"), ("dataset", str(dataset_id))] + [("sel", str(s)) for s in selection]
    query = urlencode(pairs, quote_via=quote)
    settings = to_query(state) if state is not None else ""
    return f"/views?{query}&{settings}" if settings else f"/views?{query}"


def proposal_url(proposal_id) -> str:
    """One proposal in the reviewer queue (details, comparison, signing form)."""
    return f"/review?{urlencode({'proposal': proposal_id})}"


# -- monitoring pages (owner: MONITORING) ----------------------------------------
def monitoring_url(model_id=None) -> str:
    """The reference models; with ``model_id`` the form proposing that fitted model opens filled in."""
    return f"/monitoring?{urlencode({'model': model_id})}" if model_id is not None else "/monitoring"


def reference_model_path_template() -> str:
    """Path template of one reference model's page (for dash.register_page)."""
    return "/monitoring/<reference_model_id>"


def reference_model_url(reference_model_id) -> str:
    """One reference model: frozen facts, signatures, batch upload, the continuing chart."""
    return f"/monitoring/{_path_part(reference_model_id)}"


def batch_path_template() -> str:
    """Path template of one batch's page (for dash.register_page)."""
    return "/monitoring/batches/<batch_id>"


def batch_url(batch_id) -> str:
    """One checked batch: its samples, contributions of a flagged sample, the outcome form."""
    return f"/monitoring/batches/{_path_part(batch_id)}"


def batch_report_url(batch_id, pdf: bool = False) -> str:
    """The printable report of one batch (HTML, or PDF with ``pdf``)."""
    return f"/-/monitoring/batches/{_path_part(batch_id)}/report" + (".pdf" if pdf else "")
