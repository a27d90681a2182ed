"""The dataset page's tabs as a real tab control (WAI-ARIA Authoring Practices, "Tabs").

One ``button`` with role="tab" per tab inside a role="tablist"; the tab shown has
aria-selected="true" and is the only one in the Tab order (tabindex 0, the
others -1), and every tab controls the one role="tabpanel" that holds the
toolbar and the plots. Left/Right arrows, Home and End move the focus between
the tabs (assets/a11y.js); Enter or Space opens the tab with focus ("manual
activation", recommended there when showing a panel takes a moment: each tab
fetches and draws its plots). The open tab lives in the VIEW_TABS store, which
the URL's ``tab=`` key fills and follows (``webapp.url_state``), as before.

Not a page of its own (no page is registered here). Dash's page loader runs
every module in pages/ whose text mentions register_page, once per app, which
is how the callbacks below reach each app exactly once; ``dataset.py`` imports
this module only inside functions, after the loader has run.
"""

from __future__ import annotations

from dash import Input, Output, State, clientside_callback, html

from webapp.url_state import TABS
from webapp.web.ui import ids

TAB_CLASS, SELECTED_CLASS = "ld-tab", "ld-tab ld-tab-selected"


def tab_attributes(key: str, selected: str) -> dict:
    """The attributes of tab ``key`` when ``selected`` is open."""
    chosen = key == selected
    return {"aria-selected": "true" if chosen else "false", "tabIndex": "0" if chosen else "-1",
            "className": SELECTED_CLASS if chosen else TAB_CLASS}


def tab_list(labels: dict[str, str], selected: str) -> html.Div:
    """The tablist: ``labels`` maps each tab key (``url_state.TABS``) to its visible name."""
    return html.Div(
        [html.Button(label, id=ids.view_tab(key), n_clicks=0, type="button", role="tab",
                     **{"aria-controls": ids.VIEW_TABPANEL, **tab_attributes(key, selected)})
         for key, label in labels.items()],
        id=ids.VIEW_TABLIST,
        role="tablist",
        className="ld-tabs",
        **{"aria-label": "Views of the model"},
    )


def tab_panel(children: list, selected: str) -> html.Div:
    """The tabpanel holding ``children``, named by the open tab."""
    return html.Div(children, id=ids.VIEW_TABPANEL, role="tabpanel",
                    **{"aria-labelledby": ids.view_tab(selected)})


# A press on a tab (a click, Enter or Space) opens it; pressing the open tab again changes nothing.
clientside_callback(
    f"""
    function (...args) {{
        const open = args.pop();
        const trigger = window.dash_clientside.callback_context.triggered_id;
        const key = trigger ? String(trigger).replace(/^{ids.view_tab("")}/, '') : null;
        return key && key !== open ? key : window.dash_clientside.no_update;
    }}
    """,
    Output(ids.VIEW_TABS, "data", allow_duplicate=True),
    [Input(ids.view_tab(key), "n_clicks") for key in TABS],
    State(ids.VIEW_TABS, "data"),
    prevent_initial_call=True,
)

# The open tab (from a press or from the URL) sets aria-selected, the roving tabindex
# and the panel's name.
clientside_callback(
    f"""
    function (selected) {{
        const keys = {list(TABS)!r};
        const pick = (yes, no) => keys.map(k => k === selected ? yes : no);
        return [...pick('true', 'false'), ...pick('0', '-1'),
                ...pick('{SELECTED_CLASS}', '{TAB_CLASS}'), '{ids.view_tab("")}' + selected];
    }}
    """,
    [Output(ids.view_tab(key), prop) for prop in ("aria-selected", "tabIndex", "className") for key in TABS]
    + [Output(ids.VIEW_TABPANEL, "aria-labelledby")],
    Input(ids.VIEW_TABS, "data"),
)
