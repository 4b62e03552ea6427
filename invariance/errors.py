"""Errors the command line turns into exit codes (see DESIGN.md, "Exit codes")."""


class InvarianceError(Exception):
    """A clear, user-facing error: bad input or a missing resource.

    The message is one line that names the file (or option) and says how to fix it.
    The command line prints it and exits with code 1; nothing is left half-written.
    """

    exit_code = 1


class GateFailed(InvarianceError):
    """A user-set gate (``--max-...``) was not met. The command line exits with code 3."""

    exit_code = 3
