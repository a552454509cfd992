"""Error types for bad input.

Every message names the argument (or file, key, column), states the rule and shows the
offending value, on one line: "`radius` must be in (0, 180] degrees; got -3.0".

The command line maps these to exit code 2 (usage or input error); anything else that
escapes is a failed computation (exit code 1).
"""


class InputError(ValueError):
    """An input has the right kind but a wrong value (or a file has wrong content)."""


class InputTypeError(TypeError):
    """An input has the wrong kind (a string where a number is needed, ...)."""
