"""One exception family for everything a user can get wrong.

The CLI prints the message of any :class:`NenvError` on stderr as one line and
exits non-zero; anything else is a defect in nenv.
"""


class NenvError(Exception):
    """Base class of every error nenv raises on purpose."""


class InputError(NenvError):
    """Audio or arguments that nenv cannot process (missing, corrupt, wrong rate, ...)."""


class OutputError(NenvError):
    """An output cannot be written where the user asked."""


class ConfigError(NenvError):
    """A recipe, setting or model file is malformed or does not match this version."""
