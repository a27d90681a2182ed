"""The callbacks behind each plot's "Show the numbers" button (``webapp.web.ui.plot_table``).

The button's callback reads the figure on screen and renders its numbers: the
figure travels to the server only while the table is open (a clientside
callback asks for a fresh table when an open plot changes), so a large score
plot costs nothing until someone asks.

Not a page of its own (no page is registered here). Dash's page loader runs
every module in pages/ whose text mentions register_page, once per app, which
is how the callbacks below reach each app exactly once.
"""

from __future__ import annotations

from dash import Input, Output, State, callback, clientside_callback, no_update

from webapp.web.ui import ids, plot_table


def _numbers_callbacks(graph_id: str) -> None:
    @callback(
        Output(ids.plot_numbers(graph_id), "children"),
        Output(ids.plot_numbers(graph_id), "hidden"),
        Output(ids.plot_numbers_button(graph_id), "aria-expanded"),
        Output(ids.plot_numbers_button(graph_id), "children"),
        Input(ids.plot_numbers_button(graph_id), "n_clicks"),
        Input(ids.plot_numbers_version(graph_id), "data"),
        State(graph_id, "figure"),
        prevent_initial_call=True,
    )
    def _numbers(clicks, _version, figure):
        if not clicks:
            return no_update, no_update, no_update, no_update
        return plot_table.numbers_view(clicks, figure, plot_table.PLOT_NAMES[graph_id])

    # A new figure while the table is open: ask for the table again.
    clientside_callback(
        """
        function (figure, clicks) {
            return (clicks || 0) % 2 ? Date.now() : window.dash_clientside.no_update;
        }
        """,
        Output(ids.plot_numbers_version(graph_id), "data"),
        Input(graph_id, "figure"),
        State(ids.plot_numbers_button(graph_id), "n_clicks"),
        prevent_initial_call=True,
    )


for _graph_id in plot_table.PLOT_NAMES:
    _numbers_callbacks(_graph_id)
