"""AG Grid options every table of the app uses (dash-ag-grid ``dashGridOptions``).

A table is one Tab stop (WAI-ARIA Authoring Practices, "Grid" pattern): the arrow
keys move between its cells, Space selects a row, Enter edits a cell, and Tab or
Shift+Tab leave the table instead of walking through every cell. AG Grid lets the
browser move focus when ``tabToNextCell`` / ``tabToNextHeader`` return false
(AG Grid reference, "Keyboard Navigation").
"""

from __future__ import annotations

ONE_TAB_STOP = {"tabToNextCell": {"function": "false"}, "tabToNextHeader": {"function": "false"}}
