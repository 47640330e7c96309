"""Error and warning types raised by the engine."""


class ScenarioError(ValueError):
    """An input value is invalid.

    Every message names the field, the value given and the allowed range, so
    a page or a command line can show it as it is.
    """

    def __init__(self, field: str, value, allowed: str):
        self.field = field
        self.value = value
        self.allowed = allowed
        super().__init__(f"{field} = {shown_value(value)} is not allowed: {allowed}")


def shown_value(value, width: int = 80) -> str:
    """repr(value), cut to `width` characters: a message stays one readable line
    whatever was given (a megabyte of text, a table of thousands of rows)."""
    try:
        text = repr(value)
    except ValueError:  # an integer too long for Python to write out
        return f"<a number of about {value.bit_length() * 0.30103:.0f} digits>"
    text = " ".join(text.split())
    return text if len(text) <= width else text[: width - 3] + "..."


class DivergenceError(RuntimeError):
    """The fields became non-finite or grew without bound during a run."""

    def __init__(self, step: int, reason: str):
        self.step = step
        self.reason = reason
        super().__init__(f"run diverged at step {step}: {reason}")


class RunCancelled(RuntimeError):
    """The progress callback asked the run to stop."""

    def __init__(self, step: int):
        self.step = step
        super().__init__(f"run cancelled at step {step}")


class ResolutionWarning(UserWarning):
    """The grid resolves the highest frequency of interest too coarsely."""
