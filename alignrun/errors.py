"""The one exception type users see: a clear message naming the culprit and the fix."""


class UserError(Exception):
    """Bad input from the user (config, data, model, command line). Printed without a traceback."""

    def __init__(self, message: str, exit_code: int = 2):
        super().__init__(message)
        self.exit_code = exit_code
