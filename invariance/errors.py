"""Errors the command line turns into exit codes (0 success, 1 error, 2 usage, 3 gate)."""


class InvarianceError(Exception):
    """A clear, user-facing error: bad input or a missing resource.

    The message is one line that names the file (or parameter) and says how to fix it.
    The command line prints it and exits with code 1; nothing is left half-written.
    """

    exit_code = 1


class InvalidParameter(InvarianceError, ValueError):
    """A parameter value outside its accepted range.

    ``parameter`` is the Python name (``held_out_fraction``); the command line maps it to
    its flag (``--held-out``) and exits with code 2, as for any usage error.
    """

    exit_code = 2

    def __init__(self, parameter: str, message: str):
        super().__init__(message)
        self.parameter = parameter


class GateFailed(InvarianceError):
    """A user-set gate (``--max-...``) was not met. The command line exits with code 3."""

    exit_code = 3
