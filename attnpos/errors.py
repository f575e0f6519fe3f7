"""The one exception type attnpos raises on purpose.

Every `AttnposError` message says what was wrong and what to do about it, in one short paragraph. The command
line prints the message and exits non-zero without a traceback (pass `--debug` to see one).
"""


class AttnposError(Exception):
    """A problem with the user's input, model or files, explained in plain words."""
