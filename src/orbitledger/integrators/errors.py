"""The numerical core's base error."""


class IntegratorError(Exception):
    """Base class of errors raised by the numerical core."""
