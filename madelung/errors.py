"""The one exception family of madelung.

``InputError`` is for problems the user can cause and fix (a bad file, a missing
charge, a degenerate cell); the command line turns it into a one-line message
and exit code 2. Anything else deriving from ``MadelungError`` is our own fault.
"""


class MadelungError(Exception):
    """Base class of every error raised on purpose by madelung."""


class InputError(MadelungError, ValueError):
    """A user-caused problem: the message names the file or value and what is wrong."""


class MadelungWarning(UserWarning):
    """Warnings about model choices the user should know of (net charge, averaged sites)."""


def one_line(exc) -> str:
    """The message of an exception (or warning) on one line, whitespace runs folded; its type
    name when it has no message. Status columns, progress lines and error lines use it."""
    text = " ".join(str(exc).split())
    return text or type(exc).__name__
