"""Error types shared by the numeric core.

``InputError`` is every problem caused by what a user gave us (a file, a
setting, a sample id). Callers (CLI, API, pages) catch it and show its message
as it is: exit code 2 on the command line, HTTP 400 in the API.
"""


class InputError(ValueError):
    """A problem with user input; the message names the file, row, column or value.

    ``field`` names the form field or JSON key at fault when there is one, so a
    page can show the message next to that field and the API can name it.
    """

    def __init__(self, message: str = "", *, field: str | None = None):
        super().__init__(message)
        self.field = field
