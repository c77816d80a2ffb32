"""Exceptions raised by the numerical core.

Both subclass :class:`ValueError`, so callers that only know the builtin still
catch them; the subclass says which family of mistake it was.
"""


class DimensionError(ValueError):
    """An array has the wrong shape or length for the model it is given to."""


class OrderError(ValueError):
    """A model structure (orders, delays) is impossible or inconsistent."""
