"""The JSON way in (``/api/v1``): one blueprint per resource family.

``webapp.api.routes.BLUEPRINTS`` is the route table ``create_app`` registers;
the response and error shapes every blueprint shares live in
``webapp.api.responses``.
"""
