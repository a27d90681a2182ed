"""The browser way in: Dash pages (``pages/``), their UI helpers (``ui/``) and the
plain-Flask sign-in form (``signin``)."""
