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
        """The message as the CLI prints it: ``where: message`` and an indented hint line."""
        text = f"{self.where}: {self.message}" if self.where else self.message
        if self.hint:
            text += f"\n  hint: {self.hint}"
        return text


class ConfigError(GrayboxError):
    """A study file (or its Python values) is wrong: a table, key or value."""

    layer = "config"


class ModelError(GrayboxError):
    """The model's equations, symbols or units are wrong."""

    layer = "model"


class DataError(GrayboxError):
    """A data file or table cannot be read or used: a file, row, column or tag."""

    layer = "data"


class SimulationError(GrayboxError):
    """The model cannot be simulated on this timeline (e.g. the integrator cannot proceed)."""

    layer = "simulate"


class FitError(GrayboxError):
    """The least-squares problem cannot be set up or solved as asked."""

    layer = "estimate"


class SampleError(GrayboxError):
    """The posterior stage cannot run as asked (priors, noise options, sampler settings)."""

    layer = "posterior"


class RunError(GrayboxError):
    """A run folder cannot be written or read."""

    layer = "runs"


class BatchError(GrayboxError):
    """A fleet batch is wrong: its manifest, jobs or cluster."""

    layer = "batch"
