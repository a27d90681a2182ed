"""The plotly.js configuration every ``dcc.Graph`` of the app uses.

A self-hosted QA tool never offers to send a chart or its data to an online
service: the cloud and chart-editor buttons are switched off and removed, and no
server URL is set (plotly.js reference, "Configuration Options"). Pictures are
saved with the page's own PNG/SVG buttons, which name the file after the dataset
and the plot, so the toolbar's camera button is removed as well.
"""

from __future__ import annotations

_OFFLINE = {
    "displaylogo": False,
    "showLink": False,
    "showSendToCloud": False,
    "showEditInChartStudio": False,
    "plotlyServerURL": "",
}

# The explore plots: toolbar for zoom, pan, box and lasso selection.
GRAPH_CONFIG = {
    **_OFFLINE,
    "modeBarButtonsToRemove": ["autoScale2d", "toImage", "sendDataToCloud", "editInChartStudio"],
}

# Small plots beside a table (contributions): no toolbar at all.
SMALL_GRAPH_CONFIG = {**_OFFLINE, "displayModeBar": False, "responsive": True}
