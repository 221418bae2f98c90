"""One exception type for bad user input; the CLI turns it into one line and exit code 2."""


class UserError(Exception):
    """Bad input the user can fix: printed as one line, exit code 2, no traceback."""


class Interrupted(Exception):
    """Training stopped by SIGINT/SIGTERM after writing a checkpoint; ``code`` is 130 or 143."""

    def __init__(self, code: int, message: str):
        super().__init__(message)
        self.code = code
