"""The one exception type for errors a user can cause and fix."""


class UserError(ValueError):
    """An error in the user's input or options; the message says what to change.

    The CLI prints it without a traceback and exits with status 2; the HTTP API maps it to
    a 4xx response. Anything else that escapes is a bug.
    """


class InputFileError(UserError):
    """The input file cannot be read as the fields we need (format, variables, grid, values)."""


class OptionError(UserError):
    """An option or job-spec value is out of range or unknown."""


class InputTooLargeError(InputFileError):
    """An input whose declared size is over a configured limit (the service answers 413)."""
