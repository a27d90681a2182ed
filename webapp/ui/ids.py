"""Every Dash component id, in one place (each page appends its own section).

Ids are plain strings; pattern-matching ids are built by small functions here.
"""

# -- shell (webapp/ui/shell.py) ----------------------------------------------
SHELL_NAV = "shell-nav"
SHELL_USER = "shell-user"

# -- home page (webapp/pages/home.py) -------------------------------------------
HOME_UPLOAD = "home-upload"
HOME_UPLOAD_MESSAGE = "home-upload-message"
HOME_DATASET_LIST = "home-dataset-list"
