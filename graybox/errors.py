"""One error type per layer, each carrying *where* (file, table, key, line, column, tag)
and *what to do* (a hint).  The CLI prints them as one ``error: ...`` line, exit code 2."""

from __future__ import annotations

# Exit codes of the command line and of batch jobs: 0 success; 2 a user error (one of the
# classes below, printed without a traceback); 1 an internal failure (a bug).
EXIT_OK, EXIT_INTERNAL, EXIT_USER = 0, 1, 2


class GrayboxError(Exception):
    """A user error: bad config, model, data or settings.  Never an internal bug."""

    layer = "graybox"

    def __init__(self, message: str, *, where: str | None = None, hint: str | None = None):
        self.message = message
        self.where = where
        self.hint = hint
        super().__init__(self.render())

    def render(self) -> str:
        text = f"{self.where}: {self.message}" if self.where else self.message
        if self.hint:
            text += f"\n  hint: {self.hint}"
        return text


class ConfigError(GrayboxError):
    layer = "config"


class ModelError(GrayboxError):
    layer = "model"


class DataError(GrayboxError):
    layer = "data"


class SimulationError(GrayboxError):
    layer = "simulate"


class FitError(GrayboxError):
    layer = "estimate"


class SampleError(GrayboxError):
    layer = "posterior"


class RunError(GrayboxError):
    layer = "runs"


class BatchError(GrayboxError):
    layer = "batch"
