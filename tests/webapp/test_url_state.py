"""View state <-> query string: round trip, defaults, tolerance of hand-edited links."""

from __future__ import annotations

from urllib.parse import parse_qs, urlsplit

from hypothesis import given, settings
from hypothesis import strategies as st

from webapp import url_state as U

# any text a user could type as a column or sample name, including separators and unicode
names = st.text(min_size=1, max_size=12).filter(lambda s: s.strip() == s and s != "")

states = st.builds(
    U.ViewState,
    components=st.none() | st.integers(1, 60),
    scaling=st.sampled_from(U.SCALINGS),
    log10=st.lists(names, max_size=4, unique=True).map(tuple),
    drop=st.lists(names, max_size=4, unique=True).map(tuple),
    exclude=st.lists(names, max_size=4, unique=True).map(tuple),
    confidence=st.sampled_from(U.CONFIDENCES),
    tab=st.sampled_from(U.TABS),
    include_all=st.booleans(),
    pcx=st.integers(1, 5),
    pcy=st.integers(6, 9),
    colour=st.none() | names,
    shape=st.none() | names,
    labels=st.booleans(),
    loadings=st.sampled_from(U.LOADING_VIEWS),
    sample=st.none() | names,
    order=st.none() | names,
)


@settings(max_examples=200, deadline=None)
@given(states)
def test_round_trip_through_the_query_string(state):
    query = U.to_query(state)
    back, notes = U.parse_query(query)
    assert back == state
    assert notes == []


@settings(max_examples=100, deadline=None)
@given(states)
def test_round_trip_through_dash_layout_kwargs(state):
    # Dash pages hand layout(**query) a dict: one value -> str, repeated key -> list
    # (dash/_pages.py _parse_query_string).
    parsed = parse_qs(U.to_query(state), keep_blank_values=True)
    kwargs = {k: v[0] if len(v) == 1 else v for k, v in parsed.items()}
    assert U.from_query(kwargs) == state


def test_default_state_is_an_empty_query_and_url_has_no_question_mark():
    assert U.to_query(U.ViewState()) == ""
    assert U.dataset_url(7) == "/datasets/7"
    assert U.dataset_url(7, U.ViewState()) == "/datasets/7"


def test_query_is_readable_and_in_fixed_order():
    state = U.ViewState(tab="diagnostics", components=3, log10=("Fe", "Zn"), colour="Batch", labels=True)
    assert U.to_query(state) == "tab=diagnostics&a=3&log10=Fe&log10=Zn&colour=Batch&labels=1"


def test_names_with_separators_survive():
    state = U.ViewState(colour="a&b=c", exclude=("S,1", "S 2", "x?y#z"))
    url = U.dataset_url(3, state)
    parts = urlsplit(url)
    assert parts.path == "/datasets/3" and parts.fragment == ""
    assert U.from_query(parts.query) == state


def test_bad_values_fall_back_to_defaults_with_a_note():
    state, notes = U.parse_query("tab=nope&pcx=zero&conf=2&labels=maybe&a=-1&scaling=log&loadings=x")
    assert state == U.ViewState()
    assert len(notes) == 7
    assert "ignored pcx='zero' in the link: expected a whole number of at least 1" in notes
    assert any(n.startswith("ignored conf='2'") for n in notes)


def test_same_component_on_both_axes_is_reset():
    state, notes = U.parse_query("pcx=2&pcy=2")
    assert (state.pcx, state.pcy) == (1, 2)
    assert notes


def test_unknown_keys_are_left_alone_and_auto_components_is_default():
    state, notes = U.parse_query("utm=1&a=auto")
    assert state == U.ViewState() and notes == []


def test_model_settings_hold_only_what_decides_the_fit():
    variables = ["Fe", "Zn", "Cu"]
    a = U.ViewState(colour="x", pcx=3, labels=True, tab="variance")
    b = U.ViewState()
    assert a.model_settings(variables) == b.model_settings(variables)
    assert b.model_settings(variables)["components"] == "auto"
    c = U.ViewState(components=2, drop=("Zn",), log10=("Zn", "Cu"), exclude=("S1",), confidence=0.99)
    assert c.model_settings(variables) == {
        "scaling": "autoscale", "components": 2, "variables": ["Fe", "Cu"], "log10": ["Cu"],
        "exclude": ["S1"], "confidence": 0.99, "method": "classical",
    }


def test_dataset_id_is_quoted_in_the_path():
    assert U.dataset_url("a/b") == "/datasets/a%2Fb"


def test_every_field_has_a_url_key():
    from dataclasses import fields

    assert {f.name for f in fields(U.ViewState)} == set(U._KEYS)


def test_proposal_link_lists_only_the_samples_proposed():
    """The dataset page's explained sample (``sample=`` in its view state) shares the
    proposal form's ``sample`` key: it must not join the samples proposed (it did, and
    the form then refused a sample "listed twice" or proposed one nobody chose).
    One key, one meaning: common practice."""
    url = U.propose_url(7, ["B-2"], state=U.ViewState(components=3, sample="B-9"))
    query = parse_qs(urlsplit(url).query)
    assert query["sample"] == ["B-2"]
    assert query["a"] == ["3"]
