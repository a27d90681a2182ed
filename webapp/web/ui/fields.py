"""Labels tied to their controls (WCAG 2.2, 1.3.1 and 4.1.2), for Dash 4 controls too.

One convention, which assets/a11y.js reads: the label of the control with id X
has the id ``X-label``.

- Controls a ``<label for>`` can name (dcc.Input, dcc.Textarea, and dcc.Dropdown,
  whose id sits on its ``<button>``) get ``html.Label(htmlFor=X)``. Dash 4 names a
  dropdown's button by its value alone (aria-labelledby), so the script adds the
  label in front: "Scaling, Autoscale".
- Option groups (dcc.RadioItems, dcc.Checklist: native radio buttons or check
  boxes in a ``div``) get a text element; the script turns the group into a
  radiogroup or group named by it, in place of Dash 4's listbox of options.

``hidden=True`` keeps the label for assistive technology only, where the page
already says visually what the control is for (a download chooser beside its
buttons, filters above a table).
"""

from __future__ import annotations

from dash import dcc, html

OPTION_GROUPS = (dcc.RadioItems, dcc.Checklist)


def label_id(control_id: str) -> str:
    """The id of the label of the control ``control_id``."""
    return f"{control_id}-label"


def field_label(text: str, control, *, class_name: str = "ld-field-label", hidden: bool = False):
    """The label of ``control`` (a Dash component with a string id)."""
    classes = f"{class_name} ld-visually-hidden" if hidden else class_name
    if isinstance(control, OPTION_GROUPS):
        return html.Span(text, id=label_id(control.id), className=classes)
    return html.Label(text, htmlFor=control.id, id=label_id(control.id), className=classes)


def labelled(text: str, control, *, hidden: bool = False, class_name: str = "ld-field-label") -> list:
    """[label, control]: the pair, to place side by side in a list of children."""
    return [field_label(text, control, class_name=class_name, hidden=hidden), control]
