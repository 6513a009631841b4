"""The one exception type a user can cause. The CLI turns it into a one-line message and exit 2."""


class QfitError(Exception):
    """Bad input or usage: the message says what is wrong and where."""
