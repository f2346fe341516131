"""The one exception for bad parameters at the API boundary."""


class ParameterError(ValueError):
    """A parameter violates a documented condition.

    The message names the parameter, its value and the condition, e.g.
    ``"hop_s=0.0 must be > 0"``.
    """
