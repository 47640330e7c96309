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
        super().__init__(f"{field} = {value!r} is not allowed: {allowed}")


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
