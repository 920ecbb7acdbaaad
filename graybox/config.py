"""The study file: one TOML file says what to fit to what.

Top-level tables (every key is checked; unknown keys are rejected with a suggestion)::

    [study]                 name, seed, dataset (a name recorded in the run record)
    [model] ...             states, inputs, constants, derived, outputs (graybox.model.build)
    [parameters.NAME]       guess, bounds, units, fixed, scope, prior, log_scale
    [data]                  one experiment (named "main"), or
    [experiments.NAME]      several, each with the data table's keys (graybox.data)
    [noise.OUTPUT]          sigma = 0.1 (given) or "estimate" (the default); kind, phi, ...
    [noise.groups]          NAME = ["OUT1", "OUT2", ...]: outputs in the same units sharing one
                            estimated sigma (unweighted multi-response least squares)
    [estimate]              multistart, max_evaluations, polish, engine, integrator, rtol, atol
    [sampling]              the posterior stage (graybox.posterior)

Relative paths inside resolve against the folder of the study file.  The same tables may
come as Python values (:func:`settings_from_raw`; graybox.Study.from_values).  The result,
:class:`StudySettings`, is everything but the data: each experiment's data table is handed
on located, and validated by the data layer into its DataSpec when graybox.study.Study is
built (:func:`graybox.study.load_study`).

Everything a fit needs from the study file alone is checked here, once, before any data is
read: the model, the estimate settings, the noise options, the sampler settings and every
parameter's prior (``graybox check`` and ``graybox fit`` therefore refuse a study with the same
message).  Priors are checked whether or not sampling runs (an unknown kind is an error
either way); only the rule "a uniform prior needs finite bounds" waits for sampling to be on
(the study's ``[sampling] enabled``, unless the caller decides: ``fit --no-sample``,
``check --no-sample``).  The study file must be a regular file of at most 1 MiB, nested at
most 32 levels deep (graybox.configkit).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from pathlib import Path

from graybox.configkit import Table, load_toml
from graybox.errors import ConfigError
from graybox.estimate.fit import FitSettings
from graybox.posterior.config import SamplerSettings, parameter_priors, sampler_settings
from graybox.posterior.noise import DEFAULT_KIND, NOISE_KINDS, NOISE_OPTIONS, NoiseModel, noise_models
from graybox.posterior.priors import Prior
from graybox.model.build import build_spec
from graybox.model.spec import ModelSpec
from graybox.simulate import ENGINES, Tolerances
from graybox.simulate.integrators import METHODS

TOP_KEYS = ("study", "model", "parameters", "data", "experiments", "noise", "estimate", "sampling")
STUDY_KEYS = ("name", "seed", "dataset", "description")
NOISE_KEYS = ("sigma", "kind", *NOISE_OPTIONS)
GROUPS_KEY = "groups"  # [noise.groups]: outputs sharing one estimated sigma
ESTIMATE_KEYS = ("multistart", "max_evaluations", "polish", "engine", "integrator", "rtol", "atol")
MAX_MULTISTART = 10_000  # each start is a full least-squares fit; 10 to 100 are typical
MAX_EVALUATIONS = 10_000_000


@dataclass(frozen=True)
class NoiseSpec:
    """An output's ``[noise.OUTPUT]`` table, checked: a given or estimated sigma, the noise
    kind with its options, and the noise group it shares an estimated sigma with."""

    output: str
    sigma: float | None  # None: estimated
    kind: str = DEFAULT_KIND
    options: dict = field(default_factory=dict)
    group: str | None = None  # the [noise.groups] group whose one estimated sigma it shares


@dataclass(frozen=True)
class StudySettings:
    """Everything a study says apart from its data, validated once: the model, the noise,
    the estimate, sampler and prior settings, and each experiment's located data table
    (handed to the data layer, which validates it into a ``DataSpec``: see
    :class:`graybox.study.Study`, the study with its data specs, the one a fit takes).

    The study's seed is stored once, in ``fit.seed`` (:attr:`seed`); ``sampler.seed`` is
    the ``[sampling] seed`` (or ``--seed``) only when one was given (:attr:`sampling_seed`)."""

    path: Path | None  # the study file; None for a study written as Python values
    folder: Path  # where relative paths (data files) resolve: the study file's folder
    raw: dict  # the study as read (with overrides applied)
    name: str
    dataset: str | None
    spec: ModelSpec
    data_tables: dict[str, Table]  # experiment -> its located data table, validated by the data layer
    noise: dict[str, NoiseSpec]
    fit: FitSettings  # fit.seed is the study's seed
    engine: str
    tol: Tolerances
    sampler: SamplerSettings = SamplerSettings()  # enabled: whether this run samples
    priors: dict[str, Prior] = field(default_factory=dict)  # free parameter -> prior (study file alone)
    noise_models: tuple[NoiseModel, ...] = ()  # one per measured output, validated
    overrides: dict = field(default_factory=dict)  # the study-file keys a caller replaced (fleet batches)

    @property
    def seed(self) -> int:
        """The study's seed (``[study] seed``, or the caller's replacement)."""
        return self.fit.seed

    @property
    def sampling_seed(self) -> int:
        """The seed the posterior stage uses: ``[sampling] seed`` (or ``--seed``) if given,
        else the study's seed."""
        return int(self.sampler.seed) if self.sampler.seed is not None else self.seed

    @property
    def base_dir(self) -> Path:
        """Where relative paths of the study resolve."""
        return self.folder

    @property
    def sampling(self) -> Table:
        """The ``[sampling]`` table as written (located), for tools that read it again with
        other options; a run uses :attr:`sampler`, parsed from it once."""
        return Table(self.raw.get("sampling", {}), ("sampling",), self.path)

    def with_seed(self, seed: int | None) -> "StudySettings":
        """The same settings with the study's seed replaced (None: unchanged)."""
        if seed is None:
            return self
        return replace(self, fit=replace(self.fit, seed=int(seed)))


def read_study(path: str | Path, overrides: dict | None = None, *, sample: bool | None = None,
               sampler_options: dict | None = None) -> StudySettings:
    """Read and check a study file (model, estimate, noise, sampler and prior checks); no
    data is read and the data tables are not validated yet (``graybox.study.load_study``
    does both steps).

    ``overrides`` replaces keys of top-level tables before validation, e.g.
    ``{"data": {"files": [...]}}`` (used by fleet batches to point one study at many units).
    ``sample`` decides whether this run samples (None: the study's ``[sampling] enabled``);
    ``sampler_options`` replace ``[sampling]`` keys (command-line options, None = not given)."""
    path = Path(path).resolve()
    raw = apply_overrides(load_toml(path), overrides or {}, path)
    settings = settings_from_raw(raw, path=path, folder=path.parent, sample=sample, sampler_options=sampler_options)
    return replace(settings, overrides=dict(overrides or {}))


def settings_from_raw(raw: dict, *, path: Path | None, folder: Path, sample: bool | None = None,
                      sampler_options: dict | None = None) -> StudySettings:
    """Check a study given as its tables (as a study file would hold them: ``{"study":
    {...}, "model": {...}, ...}``); ``path`` is the file they came from (None: Python
    values; errors are then located by table and key only), ``folder`` where relative paths
    resolve.  The checks are those of :func:`read_study`, in the same order."""
    if not isinstance(raw, dict):
        raise ConfigError(f"a study is a table of tables, got {type(raw).__name__}", where=str(path or "<config>"))
    top = Table(raw, (), path)
    top.check_keys(TOP_KEYS)
    st = top.sub("study")
    st.check_keys(STUDY_KEYS)
    spec = build_spec(top.sub("model", required=True), top.sub("parameters"))
    experiments = _experiments(top)
    noise = _noise(top.sub("noise"), spec)
    est = top.sub("estimate")
    est.check_keys(ESTIMATE_KEYS)
    seed = int(st.number("seed", 0, integer=True, minimum=0))
    fit = FitSettings(
        sigmas={o: n.sigma for o, n in noise.items()},
        groups=noise_groups(noise),
        multistart=_at_most(est, "multistart", int(est.number("multistart", 0, integer=True, minimum=0)),
                            MAX_MULTISTART, "10 to 100 starts are typical"),
        max_nfev=_at_most(est, "max_evaluations", int(est.number("max_evaluations", 2000, integer=True, minimum=10)),
                          MAX_EVALUATIONS, "a few thousand are typical"),
        polish=est.boolean("polish", True),
        seed=seed,
    )
    check_free_values(spec, fit, est, top.sub("parameters"))
    sampler = sampler_settings(top.sub("sampling"), sampler_options)
    sampler = replace(sampler, enabled=sampler.enabled if sample is None else bool(sample))
    priors = parameter_priors(spec, path, proper=sampler.enabled)
    models = tuple(noise_models(noise, list(spec.output_names), path))
    tol = Tolerances(
        rtol=est.number("rtol", 1e-8, positive=True),
        atol=est.number("atol", 1e-10, positive=True),
        method=est.string("integrator", "auto", METHODS),
    )
    return StudySettings(
        path=path,
        folder=Path(folder),
        raw=raw,
        name=st.string("name", spec.name),
        dataset=st.string("dataset", None) if "dataset" in st else None,
        spec=spec,
        data_tables=experiments,
        noise=noise,
        fit=fit,
        engine=est.string("engine", "auto", ENGINES),
        tol=tol,
        sampler=sampler,
        priors=priors,
        noise_models=models,
    )


def noise_groups(noise: dict[str, NoiseSpec]) -> dict[str, tuple[str, ...]]:
    """Group -> its outputs (model order), from the outputs' NoiseSpecs."""
    out: dict[str, list[str]] = {}
    for o, n in noise.items():
        if n.group is not None:
            out.setdefault(n.group, []).append(o)
    return {g: tuple(m) for g, m in out.items()}


def _at_most(table: Table, key: str, value: int, limit: int, typical: str) -> int:
    """``value`` if it is at most ``limit``, else a located error."""
    if value > limit:
        raise table.error(key, f"must be at most {limit:,}, got {value:,}", hint=typical)
    return value


def check_free_values(spec: ModelSpec, fit: FitSettings, est: Table, params: Table) -> None:
    """What the least-squares stage needs of the free values, from the study file alone:
    something to estimate, every free value reaching a measured output through the
    equations (graybox.estimate.reach), and finite bounds on every free value when
    multi-starting."""
    from graybox.model.spec import INITIAL_ESTIMATE

    free = [(p.name, p.lower, p.upper) for p in spec.parameters if not p.fixed]
    free += [(f"{s.name} (initial state)", *s.initial_bounds) for s in spec.states if s.initial == INITIAL_ESTIMATE]
    if not free:
        raise ConfigError("every parameter is fixed: there is nothing to estimate", where=params.where(),
                          hint="set fixed = false for at least one parameter")
    from graybox.estimate.reach import unused_free_values, unused_message

    for value in unused_free_values(spec):
        message, hint = unused_message(value)
        if value.kind == "parameter":
            where = params.sub(value.name).where()
        else:
            where = Table({}, ("model", "states", value.name), params.file).where("initial")
        raise ConfigError(message, where=where, hint=hint)
    if fit.multistart > 0:
        import math

        open_ = [name for name, lo, hi in free if not (math.isfinite(lo) and math.isfinite(hi))]
        if open_:
            raise ConfigError(f"multi-start needs finite bounds on every free value; without: {', '.join(open_)}",
                              where=est.where("multistart"),
                              hint="give bounds = [low, high] to every free parameter and initial_bounds to every "
                                   "estimated initial state, or set multistart = 0")


def apply_overrides(raw: dict, overrides: dict, path: Path) -> dict:
    """A copy of ``raw`` with ``overrides[table][key]`` replacing ``raw[table][key]``."""
    import copy

    def merge(into: dict, new: dict) -> None:
        for k, v in new.items():
            if isinstance(v, dict) and isinstance(into.get(k), dict):
                merge(into[k], v)
            else:
                into[k] = copy.deepcopy(v)

    out = copy.deepcopy(raw)
    for table, values in overrides.items():
        if table == "data" and "experiments" in out:
            raise ConfigError("a data override needs a study with one [data] table, not [experiments]",
                              where=str(path), hint="give each unit its own study file")
        if not isinstance(values, dict):
            raise ConfigError(f"override of [{table}] must be a table of keys", where=str(path))
        merge(out.setdefault(table, {}), values)
    return out


def _experiments(top: Table) -> dict[str, Table]:
    if "data" in top and "experiments" in top:
        raise top.error("experiments", "give either one [data] table or [experiments.NAME] tables, not both")
    if "data" in top:
        return {"main": top.sub("data")}
    exps = top.sub("experiments")
    if not exps.keys():
        raise ConfigError("no data: add a [data] table (one experiment) or [experiments.NAME] tables",
                          where=top.where())
    return {name: exps.sub(name) for name in exps.keys()}


def _noise(table: Table, spec: ModelSpec) -> dict[str, NoiseSpec]:
    """Per measured output its NoiseSpec, from ``[noise.OUTPUT]`` tables and the
    ``[noise.groups]`` table (see :func:`_noise_groups`)."""
    outputs = spec.output_names
    out = {}
    for name in table.keys():
        if name == GROUPS_KEY:
            continue
        if name not in outputs:
            import difflib

            close = difflib.get_close_matches(name, outputs, n=1)
            raise table.error(name, f"'{name}' is not a measured output of the model",
                              hint=(f"did you mean '{close[0]}'? " if close else "") + f"outputs: {', '.join(outputs)}")
    for o in outputs:
        t = table.sub(o)
        t.check_keys(NOISE_KEYS)
        sigma = t.get("sigma", "estimate")
        if sigma == "estimate":
            value = None
        else:
            value = t.number("sigma", positive=True)
        kind = t.string("kind", DEFAULT_KIND, NOISE_KINDS)
        options = {k: t.data[k] for k in NOISE_OPTIONS if k in t}
        out[o] = NoiseSpec(o, value, kind, options)
    member_of = _noise_groups(table, spec, out)
    return {o: replace(n, group=member_of.get(o)) for o, n in out.items()}


def _noise_groups(table: Table, spec: ModelSpec, noise: dict[str, NoiseSpec]) -> dict[str, str]:
    """Output -> group, from ``[noise.groups]``: each key names a group of outputs sharing one
    estimated sigma, its value the list of their names::

        [noise.groups]
        composition = ["y1", "y2", "y3"]

    Checked here, located: at least two outputs per group, each a measured output of the
    model named once and in one group only, all in the same units (factor one) and of one
    noise kind, none with a given sigma; a group's name is not an output's."""
    from graybox.model.units import parse_units, same_units

    if GROUPS_KEY in spec.output_names:
        if GROUPS_KEY in table:
            raise table.error(GROUPS_KEY, f"[noise.{GROUPS_KEY}] declares noise groups, but the model also has an "
                                          f"output named '{GROUPS_KEY}'",
                              hint=f"rename the output '{GROUPS_KEY}' in [model.outputs]")
        return {}
    groups = table.sub(GROUPS_KEY)
    outputs = spec.output_names
    units = {o.name: o.units for o in spec.outputs}
    member_of: dict[str, str] = {}
    for name in groups.keys():
        members = groups.get(name)
        if not isinstance(members, list) or not all(isinstance(m, str) for m in members):
            raise groups.error(name, f"a noise group is a list of output names, got {members!r}",
                               hint=f'e.g. {name} = ["{outputs[0]}", "{outputs[-1]}"]')
        if name in outputs:
            raise groups.error(name, f"the noise group '{name}' has the name of an output",
                               hint="give the group its own name, e.g. what its outputs measure")
        if len(members) < 2:
            raise groups.error(name, f"the noise group '{name}' names {len(members)} output(s); a group shares one "
                                     "sigma between two or more", hint="an output alone already has its own sigma")
        for o in members:
            if o not in outputs:
                import difflib

                close = difflib.get_close_matches(o, outputs, n=1)
                raise groups.error(name, f"'{o}' is not a measured output of the model",
                                   hint=(f"did you mean '{close[0]}'? " if close else "") +
                                        f"outputs: {', '.join(outputs)}")
            if members.count(o) > 1:
                raise groups.error(name, f"'{o}' is named twice in the noise group '{name}'")
            if o in member_of:
                raise groups.error(name, f"output '{o}' is already in the noise group '{member_of[o]}'",
                                   hint="an output shares its sigma with one group only")
            if noise[o].sigma is not None:
                t = table.sub(o)
                raise t.error("sigma", f"output '{o}' has its sigma given, but it is in the noise group '{name}', "
                                       "which shares one estimated sigma",
                              hint=f"remove sigma here (or set it to \"estimate\"), or take '{o}' out of the group")
            member_of[o] = name
        first = members[0]
        for o in members[1:]:
            if not same_units(parse_units(units[first]), parse_units(units[o])):
                raise groups.error(name, f"the outputs of the noise group '{name}' must have the same units, but "
                                         f"'{first}' is in [{units[first] or 'dimensionless'}] and '{o}' in "
                                         f"[{units[o] or 'dimensionless'}]",
                                   hint="one sigma suits outputs measured in the same units; give the others their "
                                        "own sigma")
            if noise[o].kind != noise[first].kind:
                raise groups.error(name, f"the outputs of the noise group '{name}' must have one noise kind, but "
                                         f"'{first}' is {noise[first].kind} and '{o}' {noise[o].kind}",
                                   hint="set the same kind in their [noise.OUTPUT] tables")
    return member_of
