"""The one exception type for errors a user can cause.

The CLI prints ``str(err)`` on one line and exits 2; the GUI shows it in a
message box. Anything else that goes wrong is a programming error and stays a
traceback.
"""


class KinemarkError(Exception):
    """A problem the user can act on (bad input file, wrong state, missing model)."""

    def __init__(self, message: str, *, where: str | None = None):
        self.where = where
        super().__init__(f"{where}: {message}" if where else message)
