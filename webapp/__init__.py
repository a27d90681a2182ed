"""LatentDesk web app. ``create_app`` (in ``webapp.app``) builds the Flask server
and mounts Dash; gunicorn runs ``webapp:create_app()``.

The packages read as the architecture (docs/design.md section 1): the ways in (``web``,
``api``, ``cli``, ``worker``) sit on ``services``, which sit on ``auth``,
``jobs`` and ``store``; ``config`` and ``url_state`` are at the bottom, beside
the framework-free numerics in the top-level ``analysis`` package.
"""

from webapp.app import create_app

__all__ = ["create_app"]
