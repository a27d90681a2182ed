"""Dash pages: one module per page (``dash.register_page``), each with its own callbacks."""
