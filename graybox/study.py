"""The study a fit takes: its settings and each experiment's data spec, validated once.

A :class:`Study` is built from a study file (:func:`load_study`, :meth:`Study.from_file`) or
from Python values (:meth:`Study.from_values`, the same tables a study file holds, as
dicts), and may take its data from pandas DataFrames already in memory instead of files
(:meth:`Study.with_data`, or ``data=`` of either constructor).  Every check runs here,
eagerly and once, in the order a study file is read: the model, noise, estimate, sampler and
prior settings (:mod:`graybox.config`), then each experiment's data table into its frozen
``DataSpec`` (:mod:`graybox.data.config`: files, tags, units, windows, holdout, informative
windows; a model with states needs a time column).  Nothing after this re-reads a table:
loading the data (``graybox check``, ``graybox fit``) takes the specs as they are.
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Mapping

from graybox.config import StudySettings, read_study, settings_from_raw
from graybox.configkit import Table
from graybox.data.config import parse_data_table
from graybox.data.spec import DataSpec, SymbolInfo
from graybox.data.time_axis import require_time_axis
from graybox.errors import ConfigError
from graybox.model.spec import ModelSpec

FRAME_DATA_HINT = "give a pandas DataFrame, a list of them, or {experiment: DataFrame or list}"


def data_symbols(spec: ModelSpec) -> dict[str, SymbolInfo]:
    """What the data layer may feed: every model input and every measured output."""
    out = {u.name: SymbolInfo(u.name, "input", u.units, u.hold) for u in spec.inputs}
    for o in spec.outputs:
        out[o.name] = SymbolInfo(o.name, "output", o.units, "previous")
    return out


def data_spec_of(settings: StudySettings, name: str, table: Table) -> DataSpec:
    """One experiment's data table validated into its ``DataSpec`` (files found, tags mapped
    to model symbols, units and windows parsed; a model with states needs a time column)."""
    spec = parse_data_table(table.data, name, symbols=data_symbols(settings.spec), base_dir=settings.base_dir,
                            where=table.where())
    require_time_axis(spec, bool(settings.spec.states))
    return spec


@dataclass(frozen=True)
class Study:
    """A validated study: its settings (:class:`graybox.config.StudySettings`) and each
    experiment's data spec.  Frozen; the ``with_*`` methods return new studies.

    The read-only attributes of the settings are available on the study itself (``spec``,
    ``name``, ``seed``, ``noise``, ``fit``, ``sampler``, ``priors``, ...)."""

    settings: StudySettings
    experiments: Mapping[str, DataSpec]  # experiment name -> its data spec, in the study's order

    # -- construction ----------------------------------------------------------------------------
    @classmethod
    def from_settings(cls, settings: StudySettings) -> "Study":
        """Validate the settings' data tables into data specs."""
        specs = {name: data_spec_of(settings, name, table) for name, table in settings.data_tables.items()}
        return cls(settings, specs)

    @classmethod
    def from_file(cls, path: str | Path, *, data: Any = None, overrides: dict | None = None,
                  sample: bool | None = None, sampler_options: dict | None = None) -> "Study":
        """Read and check a study file and its data tables (no data is read yet).

        ``data``: pandas DataFrames to take the data from instead of the files the data
        tables name (see :meth:`with_data`); ``overrides``, ``sample`` and
        ``sampler_options`` as for :func:`graybox.config.read_study`."""
        settings = read_study(path, overrides, sample=sample, sampler_options=sampler_options)
        if data is not None:
            settings = _with_frames(settings, data)
        return cls.from_settings(settings)

    @classmethod
    def from_values(cls, *, model: dict, parameters: dict | None = None, data: Any = None,
                    experiments: dict | None = None, noise: dict | None = None, estimate: dict | None = None,
                    sampling: dict | None = None, name: str | None = None, seed: int | None = None,
                    dataset: str | None = None, base_dir: str | Path | None = None, sample: bool | None = None,
                    sampler_options: dict | None = None) -> "Study":
        """A study from Python values: each keyword is the table of that name in a study
        file, as a dict (``model={"states": {"T": {"units": "degC", "rate": "..."}},
        ...}``), checked exactly as the file would be.

        ``data`` is one experiment's data table (a dict, whose ``files`` may list pandas
        DataFrames as well as paths), or simply a DataFrame (or a list of them) when
        ``experiments`` gives the tables; ``experiments`` several experiments' tables
        (``{name: table}``).  Relative paths resolve against ``base_dir`` (default: the
        current folder).  ``name``, ``seed`` and ``dataset`` are the ``[study]`` keys.
        Errors are located by table and key (there is no file to give a line of)."""
        raw: dict = {}
        study = {k: v for k, v in (("name", name), ("seed", seed), ("dataset", dataset)) if v is not None}
        if study:
            raw["study"] = study
        frames = None
        if data is not None and not isinstance(data, dict):
            frames, data = data, None
        for key, value in (("model", model), ("parameters", parameters), ("data", data),
                           ("experiments", experiments), ("noise", noise), ("estimate", estimate),
                           ("sampling", sampling)):
            if value is not None:
                raw[key] = _copy_tables(value, key)
        folder = Path(base_dir).resolve() if base_dir is not None else Path.cwd()
        settings = settings_from_raw(raw, path=None, folder=folder, sample=sample, sampler_options=sampler_options)
        if frames is not None:
            settings = _with_frames(settings, frames)
        return cls.from_settings(settings)

    def with_data(self, data: Any) -> "Study":
        """The same study taking its data from pandas DataFrames: ``data`` is a DataFrame
        (or a list of them, read in order as several files would be) for a study of one
        experiment, or ``{experiment: DataFrame or list}``.  Each frame is read as a file of
        its experiment's data table would be (its columns as the table's header: time
        column, tags or the long layout's tag/value columns, quality columns), with the
        same checks and unit conversions; the frames themselves are never modified."""
        return Study.from_settings(_with_frames(self.settings, data))

    def with_seed(self, seed: int | None) -> "Study":
        """The same study with its seed replaced (None: unchanged); fleet jobs use this."""
        return replace(self, settings=self.settings.with_seed(seed))

    # -- the settings, read-only -------------------------------------------------------------
    @property
    def path(self) -> Path | None:
        """The study file (None for a study given as Python values)."""
        return self.settings.path

    @property
    def base_dir(self) -> Path:
        """Where the study's relative paths resolve."""
        return self.settings.base_dir

    @property
    def raw(self) -> dict:
        """The study's tables as read (overrides applied)."""
        return self.settings.raw

    @property
    def name(self) -> str:
        """``[study] name`` (default: the model's name)."""
        return self.settings.name

    @property
    def seed(self) -> int:
        """The study's seed (see :class:`graybox.config.StudySettings`)."""
        return self.settings.seed

    @property
    def sampling_seed(self) -> int:
        """The seed of the posterior stage: ``[sampling] seed`` if given, else the study's."""
        return self.settings.sampling_seed

    @property
    def dataset(self) -> str | None:
        """``[study] dataset``, recorded in the run record."""
        return self.settings.dataset

    @property
    def spec(self) -> ModelSpec:
        """The checked model."""
        return self.settings.spec

    @property
    def noise(self) -> dict:
        """Output -> its ``NoiseSpec``."""
        return self.settings.noise

    @property
    def fit(self):
        """The least-squares settings (``FitSettings``)."""
        return self.settings.fit

    @property
    def engine(self) -> str:
        """The simulation engine asked for (``[estimate] engine``)."""
        return self.settings.engine

    @property
    def tol(self):
        """The integrator and its tolerances (``Tolerances``)."""
        return self.settings.tol

    @property
    def sampler(self):
        """The posterior stage's settings (``SamplerSettings``; ``enabled``: whether a run samples)."""
        return self.settings.sampler

    @property
    def priors(self) -> dict:
        """Free parameter -> its prior, checked from the study alone."""
        return self.settings.priors

    @property
    def noise_models(self) -> tuple:
        """One validated noise model per measured output."""
        return self.settings.noise_models

    @property
    def sampling(self) -> Table:
        """The ``[sampling]`` table as written (a run uses :attr:`sampler`)."""
        return self.settings.sampling

    def __repr__(self) -> str:
        where = str(self.path) if self.path else "Python values"
        exps = ", ".join(f"'{n}'" for n in self.experiments)
        return f"Study('{self.name}' from {where}; experiments {exps}; {self.spec.describe().splitlines()[0]})"


def load_study(path: str | Path, overrides: dict | None = None, *, sample: bool | None = None,
               sampler_options: dict | None = None, data: Any = None) -> Study:
    """Read and check a study file and its data tables: :meth:`Study.from_file`."""
    return Study.from_file(path, data=data, overrides=overrides, sample=sample, sampler_options=sampler_options)


def as_study(study: Study | StudySettings) -> Study:
    """A :class:`Study` from either a study or settings without data specs (what
    :func:`graybox.config.read_study` returns)."""
    return study if isinstance(study, Study) else Study.from_settings(study)


# -- frames in place of files -------------------------------------------------------------------
def _copy_tables(value: Any, key: str) -> Any:
    """A deep copy of nested dicts and lists (DataFrames inside are kept as they are: the
    data layer copies them when it takes them)."""
    if isinstance(value, dict):
        return {k: _copy_tables(v, f"{key}.{k}") for k, v in value.items()}
    if isinstance(value, list):
        return [_copy_tables(v, key) for v in value]
    if isinstance(value, tuple):
        return [_copy_tables(v, key) for v in value]
    if hasattr(value, "columns") and hasattr(value, "iloc"):  # a DataFrame
        return value
    return copy.deepcopy(value)


def _frames_by_experiment(settings: StudySettings, data: Any) -> dict[str, list]:
    names = list(settings.data_tables)
    if isinstance(data, Mapping):
        unknown = [k for k in data if k not in settings.data_tables]
        if unknown:
            raise ConfigError(f"no experiment named '{unknown[0]}' to take data frames",
                              where=str(settings.path or "<config>"), hint=f"the experiments: {', '.join(names)}")
        return {k: list(v) if isinstance(v, (list, tuple)) else [v] for k, v in data.items()}
    if len(names) != 1:
        raise ConfigError(f"the study has {len(names)} experiments: say which data frames feed which",
                          where=str(settings.path or "<config>"), hint=FRAME_DATA_HINT)
    return {names[0]: list(data) if isinstance(data, (list, tuple)) else [data]}


def _with_frames(settings: StudySettings, data: Any) -> StudySettings:
    """The settings with the named experiments' ``files`` replaced by DataFrames."""
    tables = dict(settings.data_tables)
    for name, frames in _frames_by_experiment(settings, data).items():
        if not frames:
            raise ConfigError(f"no data frame given for experiment '{name}'", where=tables[name].where("files"),
                              hint=FRAME_DATA_HINT)
        t = tables[name]
        tables[name] = Table({**t.data, "files": frames}, t.path, t.file)
    return replace(settings, data_tables=tables)
