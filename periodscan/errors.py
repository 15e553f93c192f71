"""One exception family for everything a user can get wrong.

The CLI turns any :class:`PeriodscanError` into a single line on stderr and exit code 2;
anything else is a bug and keeps its traceback.
"""


class PeriodscanError(Exception):
    """Base class of every error periodscan raises on purpose."""


class ConfigError(PeriodscanError, ValueError):
    """A config value is missing, of the wrong type, or outside what is allowed.

    Messages follow one form: which field, what is allowed, what was given.
    """


class DataError(PeriodscanError):
    """A dataset cannot be read or is unusable (missing folder, bad arrays, one class only)."""


class SweepError(PeriodscanError):
    """A sweep cannot start or go on (results folder in use, made by another config, ...)."""


def bad_value(field: str, allowed: str, got: object) -> ConfigError:
    """Build the standard message: ``The 'field' parameter must be <allowed>. Got <got>.``"""
    return ConfigError(f"The '{field}' parameter must be {allowed}. Got {got!r} instead.")
