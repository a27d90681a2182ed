"""LatentDesk web app. ``webapp.app.create_app`` builds the Flask server and mounts
Dash; gunicorn runs ``webapp.app:create_app()``.

The packages read as the architecture (docs/design.md section 1): the ways in (``web``,
``api``, ``cli``, ``worker``) sit on ``services``, which sit on ``auth``,
``jobs`` and ``store``; ``config`` and ``url_state`` are at the bottom, beside
the framework-free numerics in the top-level ``analysis`` package. This package
file imports nothing, so importing any part of ``webapp`` never pulls in the app
factory (imports point down only).
"""
