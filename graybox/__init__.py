"""graybox: gray-box parameter estimation for first-principles process models.

Data flows one way: config -> data + model -> simulation -> estimate -> uncertainty ->
diagnostics -> report.  Each layer lives in its own subpackage; the public API composes
them (:mod:`graybox.api`)::

    study = graybox.Study.from_file("configs/storage_vessel.toml", data=frame)
    result = graybox.fit(study)          # StudyFit: print it, result.to_frame(), result.to_dict()
    posterior = result.sample()          # StudyPosterior: posterior.draws()
    graybox.write_run("run", posterior)  # the run folder

The names are imported on first use, so that ``import graybox`` stays cheap (the command
line imports what each command needs).
"""

from graybox.versions import GRAYBOX_VERSION as __version__

_API = {"Study": "graybox.study", "load_study": "graybox.study", "StudyFit": "graybox.results",
        "StudyPosterior": "graybox.results", "StudyCheck": "graybox.results", "check": "graybox.api",
        "fit": "graybox.api", "sample": "graybox.results", "write_run": "graybox.api"}

__all__ = ["__version__", *_API]


def __getattr__(name: str):
    """The public API, imported when first asked for (PEP 562)."""
    if name in _API:
        import importlib

        value = getattr(importlib.import_module(_API[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'graybox' has no attribute '{name}'")
