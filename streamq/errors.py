"""The one error type that user-facing code raises for bad input.

A :class:`StreamqError` carries a one-line message that already names the
file, node, field or sample position at fault. The command line prints it as
``streamq: <message>`` and exits with status 2, with no traceback.
"""


class StreamqError(ValueError):
    """Bad input or configuration, reported to the user in one line."""

    exit_code = 2

    def __init__(self, message: str):
        super().__init__(" ".join(str(message).split()))
