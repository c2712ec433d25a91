"""Errors raised by the calculation engine.

Every message names the input that is wrong, so a command-line user or a form
can show it as it is.
"""


class EngineError(Exception):
    """Base class of all engine errors."""


class InputError(EngineError, ValueError):
    """An input value is missing, of the wrong type or outside its range.

    ``field`` is the dotted path of the offending input (for example
    ``subsystems[1].beta``) so callers can attach the message to a form field.
    """

    def __init__(self, field: str, message: str):
        self.field = field
        self.message = message
        super().__init__(f"{field}: {message}")
