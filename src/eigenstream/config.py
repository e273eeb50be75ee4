"""Run configuration: TOML in, frozen dataclasses out, validated before any work starts.

Precedence is defaults < file < ``--set`` overrides. Unknown sections and keys are errors
that suggest the nearest valid name. Relative paths are resolved against the directory of
the configuration file (or the current directory for a dict).
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from eigenstream.errors import ConfigError

INPUT_FORMATS = ("npy", "zarr", "csv", "parquet", "hdf5")
SUFFIX_FORMATS = {
    ".npy": "npy",
    ".zarr": "zarr",
    ".csv": "csv",
    ".txt": "csv",
    ".parquet": "parquet",
    ".pq": "parquet",
    ".h5": "hdf5",
    ".hdf5": "hdf5",
    ".hdf": "hdf5",
}


def _fail(section: str, key: str, rule: str, value: Any) -> ConfigError:
    return ConfigError(f"`[{section}] {key}` must be {rule}; got {value!r}.")


def _int(section: str, key: str, value: Any, low: int, high: int | None = None) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < low or (
        high is not None and value > high
    ):
        rule = f"an integer >= {low}" if high is None else f"an integer in [{low}, {high}]"
        raise _fail(section, key, rule, value)
    return value


def _number(section: str, key: str, value: Any, low: float, high: float | None = None) -> float:
    ok = isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)
    if not ok or value < low or (high is not None and value > high):
        rule = f"a number >= {low}" if high is None else f"a number in [{low}, {high}]"
        raise _fail(section, key, rule, value)
    return float(value)


def _choice(section: str, key: str, value: Any, options: tuple[str, ...]) -> str:
    if value not in options:
        raise _fail(section, key, "one of " + ", ".join(repr(o) for o in options), value)
    return value


def _str_list(section: str, key: str, value: Any) -> tuple[str, ...] | None:
    if value is None:
        return None
    if not isinstance(value, list | tuple) or not all(isinstance(v, str) for v in value):
        raise _fail(section, key, "a list of column names", value)
    if not value:
        raise _fail(section, key, "a non-empty list of column names (or left out)", value)
    return tuple(value)


def _opt_str(section: str, key: str, value: Any) -> str | None:
    if value is not None and not (isinstance(value, str) and value):
        raise _fail(section, key, "a non-empty string", value)
    return value


@dataclass(frozen=True)
class InputConfig:
    """Where the rows come from (section ``[input]``)."""

    path: str = ""
    format: str | None = None
    dataset: str | None = None
    columns: tuple[str, ...] | None = None
    exclude_columns: tuple[str, ...] | None = None
    id_column: str | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.path, str) or not self.path:
            raise ConfigError(
                "`[input] path` is required: the file or store holding the rows to embed."
            )
        if self.format is not None:
            _choice("input", "format", self.format, INPUT_FORMATS)
        _opt_str("input", "dataset", self.dataset)
        _opt_str("input", "id_column", self.id_column)
        object.__setattr__(self, "columns", _str_list("input", "columns", self.columns))
        object.__setattr__(
            self, "exclude_columns", _str_list("input", "exclude_columns", self.exclude_columns)
        )

    @property
    def resolved_format(self) -> str:
        """The format given, or the one implied by the path's suffix."""
        if self.format is not None:
            return self.format
        suffix = Path(self.path.rstrip("/")).suffix.lower()
        if suffix not in SUFFIX_FORMATS:
            known = ", ".join(sorted(SUFFIX_FORMATS))
            raise ConfigError(
                f"Cannot tell the format of {self.path!r} from its suffix {suffix or '(none)'!r}; "
                f"set `[input] format` to one of {', '.join(INPUT_FORMATS)} (known suffixes: {known})."
            )
        return SUFFIX_FORMATS[suffix]


@dataclass(frozen=True)
class PrepConfig:
    """Column preparation before neighbours (section ``[prep]``)."""

    standardize: bool = False
    pca_components: int = 0

    def __post_init__(self) -> None:
        if not isinstance(self.standardize, bool):
            raise _fail("prep", "standardize", "true or false", self.standardize)
        _int("prep", "pca_components", self.pca_components, 0)


@dataclass(frozen=True)
class LandmarkConfig:
    """Landmark (Nystrom) mode (section ``[landmarks]``); count 0 = full graph."""

    count: int = 0
    method: str = "uniform"

    def __post_init__(self) -> None:
        _int("landmarks", "count", self.count, 0)
        _choice("landmarks", "method", self.method, ("uniform", "kmeans++"))


@dataclass(frozen=True)
class GraphConfig:
    """The k-nearest-neighbour graph (section ``[graph]``)."""

    neighbors: int = 15
    metric: str = "euclidean"
    method: str = "auto"
    exact_max_rows: int = 20_000
    shards: int = 0
    search_threads: int = 0

    def __post_init__(self) -> None:
        _int("graph", "neighbors", self.neighbors, 1)
        _int("graph", "shards", self.shards, 0)
        _int("graph", "search_threads", self.search_threads, 0)
        _choice("graph", "metric", self.metric, ("euclidean", "cosine"))
        _choice("graph", "method", self.method, ("auto", "exact", "approximate"))
        _int("graph", "exact_max_rows", self.exact_max_rows, 0)


@dataclass(frozen=True)
class KernelConfig:
    """Gaussian kernel on the graph's edges (section ``[kernel]``)."""

    bandwidth: str | float = "adaptive"
    bandwidth_neighbor: int = 7
    alpha: float = 1.0

    def __post_init__(self) -> None:
        bw = self.bandwidth
        if isinstance(bw, str):
            if bw != "adaptive":
                raise _fail("kernel", "bandwidth", '"adaptive" or a positive number', bw)
        else:
            ok = isinstance(bw, int | float) and not isinstance(bw, bool)
            if not ok or not math.isfinite(bw) or bw <= 0:
                raise _fail("kernel", "bandwidth", '"adaptive" or a positive number', bw)
            object.__setattr__(self, "bandwidth", float(bw))
        _int("kernel", "bandwidth_neighbor", self.bandwidth_neighbor, 1)
        object.__setattr__(self, "alpha", _number("kernel", "alpha", self.alpha, 0.0, 1.0))


def worker_processes_for(config: Config) -> bool:
    """What ``[cluster] processes = "auto"`` means for a local cluster running ``config``.

    Threads for the full graph: its work is one search task and the driver's eigensolver, so
    worker processes only add their own imports and copies (measured, 1M x 50 rows on 2 cores:
    70.1 s and 1.98 GiB with threads against 96.3 s and 2.31 GiB with processes). Processes
    in landmark mode, whose extension runs many row-block tasks that hold Python's lock part of
    the time (1M rows, 20,000 landmarks: extension 77.7 s on threads against 60.8 s on
    processes; whole run 209.2 s / 0.69 GiB against 203.1 s / 1.12 GiB).
    """
    return config.landmarks.count > 0


# Most eigenpairs `[embedding] choose_from` may ask for: each one is a column of the solver's
# block and of the regression; beyond this the leading ones are better asked for directly.
MAX_CHOOSE_FROM = 30


@dataclass(frozen=True)
class EmbeddingConfig:
    """What the map holds (section ``[embedding]``)."""

    components: int = 2
    diffusion_time: float = 1.0
    choose_from: int = 0

    def __post_init__(self) -> None:
        _int("embedding", "components", self.components, 1)
        low = self.components + 1
        value = self.choose_from
        if type(value) is not int or not (value == 0 or low <= value <= MAX_CHOOSE_FROM):
            rule = f"0 (the leading eigenvectors) or an integer in [{low}, {MAX_CHOOSE_FROM}]"
            raise _fail("embedding", "choose_from", rule, value)
        object.__setattr__(
            self,
            "diffusion_time",
            _number("embedding", "diffusion_time", self.diffusion_time, 0.0),
        )


@dataclass(frozen=True)
class SolverConfig:
    """Eigensolver accuracy and effort (section ``[solver]``)."""

    method: str = "auto"
    tol: float = 1e-8
    max_matvecs: int = 200_000
    check_multiplicity: bool = True
    matvec: str = "auto"

    def __post_init__(self) -> None:
        _choice("solver", "method", self.method, ("auto", "lanczos", "lobpcg", "arpack"))
        _choice("solver", "matvec", self.matvec, ("auto", "driver", "workers"))
        if self.method == "lobpcg" and self.matvec == "workers":
            raise ConfigError(
                '`[solver] method = "lobpcg"` needs the graph in the driver (its multigrid '
                'preconditioner); got `matvec = "workers"`. Hint: use method = "lanczos" or '
                'matvec = "driver".'
            )
        object.__setattr__(self, "tol", _number("solver", "tol", self.tol, 0.0, 0.1))
        _int("solver", "max_matvecs", self.max_matvecs, 10)
        if not isinstance(self.check_multiplicity, bool):
            raise _fail("solver", "check_multiplicity", "true or false", self.check_multiplicity)


@dataclass(frozen=True)
class RunConfig:
    """Where and how the run happens (section ``[run]``)."""

    workdir: str = "eigenstream-work"
    seed: int = 0
    chunk_rows: int | str = "auto"
    on_bad_rows: str = "refuse"
    dtype: str = "float32"
    checkpoint_seconds: float = 60.0
    checkpoints: bool = True
    memory_limit: str = "auto"

    def __post_init__(self) -> None:
        if not isinstance(self.workdir, str) or not self.workdir:
            raise _fail("run", "workdir", "a non-empty path", self.workdir)
        _int("run", "seed", self.seed, 0, 2**32 - 1)
        if self.chunk_rows != "auto" and (
            isinstance(self.chunk_rows, bool) or not isinstance(self.chunk_rows, int)
            or self.chunk_rows < 1
        ):
            # "auto": derived from the memory budget when the run starts (budget.py)
            raise _fail("run", "chunk_rows", 'an integer >= 1 or "auto"', self.chunk_rows)
        _choice("run", "on_bad_rows", self.on_bad_rows, ("refuse", "drop"))
        _choice("run", "dtype", self.dtype, ("float32", "float64"))
        memory_bytes(self.memory_limit)
        if not isinstance(self.checkpoints, bool):
            raise _fail("run", "checkpoints", "true or false", self.checkpoints)
        object.__setattr__(
            self, "checkpoint_seconds",
            _number("run", "checkpoint_seconds", self.checkpoint_seconds, 0.0),
        )


@dataclass(frozen=True)
class ClusterConfig:
    """Which dask.distributed cluster runs the work (section ``[cluster]``).

    ``kind`` picks the cluster: ``"local"`` (a LocalCluster on this machine), ``"address"``
    (a running scheduler) or ``"slurm"`` / ``"pbs"`` (worker jobs submitted to a batch queue
    through dask-jobqueue; the scheduler runs inside the driver). Keys that belong to another
    kind than the one chosen are refused, so a typo in ``kind`` cannot go unnoticed. For the
    job-queue kinds ``threads_per_worker`` is ``cores / processes_per_job`` and is filled in.
    """

    kind: str = "local"
    address: str | None = None
    workers: int = 0
    threads_per_worker: int = 1
    processes: bool | str = "auto"
    dashboard_address: str = "127.0.0.1:0"
    cores: int = 0
    memory: str | None = None
    walltime: str | None = None
    queue: str | None = None
    account: str | None = None
    jobs: int = 1
    processes_per_job: int = 1
    job_extra: tuple[str, ...] = ()
    interface: str | None = None
    worker_wait_seconds: float = 600.0

    KINDS = ("local", "address", "slurm", "pbs")
    JOB_QUEUE_KINDS = ("slurm", "pbs")
    # Which kinds read each key that is not common to all of them.
    _KEY_KINDS = {
        "address": ("address",),
        "workers": ("local",),
        "processes": ("local",),
        "dashboard_address": ("local", "slurm", "pbs"),
        "cores": JOB_QUEUE_KINDS,
        "memory": JOB_QUEUE_KINDS,
        "walltime": JOB_QUEUE_KINDS,
        "queue": JOB_QUEUE_KINDS,
        "account": JOB_QUEUE_KINDS,
        "jobs": JOB_QUEUE_KINDS,
        "processes_per_job": JOB_QUEUE_KINDS,
        "job_extra": JOB_QUEUE_KINDS,
        "interface": JOB_QUEUE_KINDS,
        "worker_wait_seconds": ("address", "slurm", "pbs"),
    }
    # Workers retire this long before the walltime ends (at least), see walltime_seconds.
    MIN_WALLTIME_SECONDS = 600
    MIN_WORKER_MEMORY = 256 << 20

    def __post_init__(self) -> None:
        _choice("cluster", "kind", self.kind, self.KINDS)
        self._check_types()
        self._check_kind_keys()
        if self.kind == "address" and not self.address:
            raise ConfigError(
                '`[cluster] address` is required when `kind = "address"`, '
                'e.g. address = "tcp://127.0.0.1:8786".'
            )
        if self.kind in self.JOB_QUEUE_KINDS:
            self._check_job_queue()

    def _check_types(self) -> None:
        _opt_str("cluster", "address", self.address)
        _int("cluster", "workers", self.workers, 0)
        _int("cluster", "threads_per_worker", self.threads_per_worker, 1)
        if not (isinstance(self.processes, bool) or self.processes == "auto"):
            raise _fail("cluster", "processes", 'true, false or "auto"', self.processes)
        _opt_str("cluster", "dashboard_address", self.dashboard_address)
        if self.kind not in self.JOB_QUEUE_KINDS:  # there, _check_job_queue says more
            _int("cluster", "cores", self.cores, 0)
        _int("cluster", "jobs", self.jobs, 1)
        _int("cluster", "processes_per_job", self.processes_per_job, 1)
        for key in ("queue", "account", "interface"):
            value = getattr(self, key)
            if value is not None and (
                not isinstance(value, str) or not value or any(c.isspace() for c in value)
            ):
                raise _fail("cluster", key, "a non-empty name without spaces", value)
        if self.memory is not None:
            self.memory_bytes()
        if self.walltime is not None:
            self.walltime_seconds()
        object.__setattr__(self, "job_extra", self._job_extra(self.job_extra))
        object.__setattr__(
            self, "worker_wait_seconds",
            _number("cluster", "worker_wait_seconds", self.worker_wait_seconds, 0.0),
        )
        if self.worker_wait_seconds <= 0:
            raise _fail("cluster", "worker_wait_seconds", "a number of seconds > 0",
                        self.worker_wait_seconds)

    def _job_extra(self, value: Any) -> tuple[str, ...]:
        rule = ('a list of extra batch directives without their prefix, '
                'e.g. ["--constraint=haswell"]')
        if not isinstance(value, list | tuple) or not all(
            isinstance(v, str) and v.strip() and "\n" not in v for v in value
        ):
            raise _fail("cluster", "job_extra", rule, value)
        for line in value:
            if line.lstrip().startswith("#"):
                raise ConfigError(
                    f"`[cluster] job_extra` entry {line!r} starts with '#': give the directive "
                    "without its #SBATCH/#PBS prefix (it is added), e.g. \"--constraint=haswell\"."
                )
        return tuple(value)

    def _check_kind_keys(self) -> None:
        defaults = {f.name: f.default for f in dataclasses.fields(self)}
        for key, kinds in self._KEY_KINDS.items():
            if self.kind in kinds or getattr(self, key) == defaults[key]:
                continue
            names = " or ".join(f'"{k}"' for k in kinds)
            raise ConfigError(
                f"`[cluster] {key}` applies only to kind = {names}, not to "
                f'kind = "{self.kind}"; remove it or change `kind`.'
            )

    def _check_job_queue(self) -> None:
        kind = self.kind
        if self.cores == 0 and not isinstance(self.cores, bool):  # 0 = left out
            raise ConfigError(
                f'`[cluster] cores` is required for kind = "{kind}": cores booked per worker '
                "job, an integer >= 1, e.g. cores = 8."
            )
        if self.memory is None:
            raise ConfigError(
                f'`[cluster] memory` is required for kind = "{kind}": memory booked per '
                'worker job, e.g. memory = "32GiB".'
            )
        if self.walltime is None:
            raise ConfigError(
                f'`[cluster] walltime` is required for kind = "{kind}": run time of each '
                'worker job as "HH:MM:SS", e.g. walltime = "02:00:00".'
            )
        _int("cluster", "cores", self.cores, 1)
        per_job = self.processes_per_job
        if self.cores % per_job:
            raise ConfigError(
                f"`[cluster] processes_per_job` ({per_job}) must divide `[cluster] cores` "
                f"({self.cores}) so every worker gets the same number of threads."
            )
        if self.memory_bytes() // per_job < self.MIN_WORKER_MEMORY:
            raise ConfigError(
                f"`[cluster] memory` = {self.memory!r} leaves less than 256 MiB for each of the "
                f"{per_job} worker processes of a job; raise it or lower `processes_per_job`."
            )
        threads = self.cores // per_job
        if self.threads_per_worker not in (1, threads):
            raise ConfigError(
                f"`[cluster] threads_per_worker` ({self.threads_per_worker}) must equal "
                f"`cores` / `processes_per_job` = {threads} for kind = \"{kind}\"; leave it out."
            )
        object.__setattr__(self, "threads_per_worker", threads)

    def memory_bytes(self) -> int:
        """``memory`` per worker job in bytes."""
        from dask.utils import parse_bytes

        try:
            value = parse_bytes(self.memory) if isinstance(self.memory, str) else -1
        except (ValueError, TypeError):
            value = -1
        if value <= 0:
            raise _fail("cluster", "memory", 'a size per job such as "32GiB"', self.memory)
        return int(value)

    def walltime_seconds(self) -> int:
        """``walltime`` ("HH:MM:SS", hours may exceed 24) in seconds."""
        import re

        text = self.walltime
        match = re.fullmatch(r"(\d{1,4}):([0-5]\d):([0-5]\d)", text) if isinstance(
            text, str) else None
        if match is None:
            raise _fail("cluster", "walltime", 'a run time "HH:MM:SS" such as "02:00:00"', text)
        hours, minutes, seconds = (int(g) for g in match.groups())
        total = 3600 * hours + 60 * minutes + seconds
        if total < self.MIN_WALLTIME_SECONDS:
            raise ConfigError(
                f"`[cluster] walltime` = {text!r} is too short: give at least \"00:10:00\" so "
                "workers can do work and still retire before the queue stops them."
            )
        return total


@dataclass(frozen=True)
class MapConfig:
    """The PNG map written at the end of a run (section ``[map]``)."""

    color_column: str | None = None

    def __post_init__(self) -> None:
        _opt_str("map", "color_column", self.color_column)


def memory_bytes(text: Any) -> int | None:
    """``[run] memory_limit`` in bytes ("2GiB", "500MB", a number of bytes); None for "auto"."""
    if text == "auto":
        return None
    from dask.utils import parse_bytes

    try:
        value = parse_bytes(text) if isinstance(text, str) else int(text)
    except (ValueError, TypeError):
        value = -1
    if isinstance(text, bool) or value <= 0:
        raise _fail("run", "memory_limit", 'a size such as "2GiB" or "auto"', text)
    return int(value)


SECTIONS: dict[str, type] = {
    "input": InputConfig,
    "prep": PrepConfig,
    "landmarks": LandmarkConfig,
    "graph": GraphConfig,
    "kernel": KernelConfig,
    "embedding": EmbeddingConfig,
    "solver": SolverConfig,
    "run": RunConfig,
    "cluster": ClusterConfig,
    "map": MapConfig,
}


@dataclass(frozen=True)
class Config:
    """A complete, validated run configuration.

    Build one with :func:`load_config` (file), :meth:`Config.from_dict` (mapping) or
    directly from section objects. ``to_dict()`` is lossless and is what the work
    directory stores.
    """

    input: InputConfig
    prep: PrepConfig = field(default_factory=PrepConfig)
    landmarks: LandmarkConfig = field(default_factory=LandmarkConfig)
    graph: GraphConfig = field(default_factory=GraphConfig)
    kernel: KernelConfig = field(default_factory=KernelConfig)
    embedding: EmbeddingConfig = field(default_factory=EmbeddingConfig)
    solver: SolverConfig = field(default_factory=SolverConfig)
    run: RunConfig = field(default_factory=RunConfig)
    cluster: ClusterConfig = field(default_factory=ClusterConfig)
    map: MapConfig = field(default_factory=MapConfig)

    def __post_init__(self) -> None:
        k = self.graph.neighbors
        if self.kernel.bandwidth == "adaptive" and self.kernel.bandwidth_neighbor > k:
            raise ConfigError(
                f"`[kernel] bandwidth_neighbor` ({self.kernel.bandwidth_neighbor}) must not exceed "
                f"`[graph] neighbors` ({k}); lower it or raise the number of neighbours."
            )
        if self.cluster.kind == "local" and self.cluster.processes == "auto":
            resolved = dataclasses.replace(self.cluster, processes=worker_processes_for(self))
            object.__setattr__(self, "cluster", resolved)
        m = self.landmarks.count
        if m and m < k + 1:
            raise ConfigError(
                f"`[landmarks] count` = {m} must be at least `[graph] neighbors` + 1 = {k + 1} "
                "(or 0 for the full graph)."
            )

    def to_dict(self) -> dict[str, dict[str, Any]]:
        """Return the configuration as nested plain dicts (TOML/JSON friendly, no None)."""
        out: dict[str, dict[str, Any]] = {}
        for name in SECTIONS:
            section = dataclasses.asdict(getattr(self, name))
            out[name] = {
                key: list(v) if isinstance(v, tuple) else v
                for key, v in section.items()
                if v is not None
            }
        return out

    @classmethod
    def from_dict(
        cls,
        data: dict[str, Any],
        *,
        base_dir: str | Path | None = None,
        source: str = "the configuration",
    ) -> Config:
        """Validate a nested mapping and build a :class:`Config`.

        Parameters
        ----------
        data : dict
            ``{section: {key: value}}`` as read from TOML.
        base_dir : path-like, optional
            Directory against which relative ``[input] path`` and ``[run] workdir`` are
            resolved; the current directory when None.
        source : str, default="the configuration"
            Name used in error messages (usually the file's path).
        """
        if not isinstance(data, dict):
            raise ConfigError(f"{source} must be a table of sections; got {type(data).__name__}.")
        base = Path(base_dir) if base_dir is not None else Path.cwd()
        sections: dict[str, Any] = {}
        for name, values in data.items():
            if name not in SECTIONS:
                raise ConfigError(f"Unknown section `[{name}]` in {source}.{_suggest(name, SECTIONS)}")
            if not isinstance(values, dict):
                raise ConfigError(f"`[{name}]` in {source} must be a table of keys.")
            section_cls = SECTIONS[name]
            valid = [f.name for f in dataclasses.fields(section_cls)]
            for key in values:
                if key not in valid:
                    raise ConfigError(
                        f"Unknown key `[{name}] {key}` in {source}.{_suggest(key, valid)}"
                    )
            values = dict(values)
            if name == "input" and isinstance(values.get("path"), str) and values["path"]:
                values["path"] = str((base / Path(values["path"]).expanduser()).resolve())
            if name == "run" and isinstance(values.get("workdir"), str) and values["workdir"]:
                values["workdir"] = str((base / Path(values["workdir"]).expanduser()).resolve())
            sections[name] = section_cls(**values)
        if "input" not in sections:
            raise ConfigError(
                f"{source} has no `[input]` section; add one with `path = \"your-table.parquet\"`."
            )
        if "run" not in sections:
            sections["run"] = RunConfig(workdir=str((base / RunConfig.workdir).resolve()))
        elif "workdir" not in data["run"]:
            sections["run"] = dataclasses.replace(
                sections["run"], workdir=str((base / RunConfig.workdir).resolve())
            )
        return cls(**sections)


def _suggest(word: str, options) -> str:
    close = difflib.get_close_matches(word, list(options), n=1, cutoff=0.6)
    if close:
        return f" Did you mean `{close[0]}`?"
    return " Valid names: " + ", ".join(f"`{o}`" for o in options) + "."


def parse_override(text: str) -> tuple[str, str, Any]:
    """Split ``section.key=value`` into its parts; the value is read as a TOML literal.

    A value that is not valid TOML (``metric=cosine``) is taken as a plain string.
    """
    name, sep, raw = text.partition("=")
    section, dot, key = name.strip().partition(".")
    if not sep or not dot or not section or not key:
        raise ConfigError(
            f"`--set {text}` must look like section.key=value, e.g. --set graph.neighbors=10."
        )
    try:
        value = tomllib.loads(f"v = {raw.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        value = raw.strip()
    return section, key, value


def apply_overrides(data: dict[str, Any], overrides: list[str] | tuple[str, ...]) -> dict[str, Any]:
    """Return a copy of ``data`` with every ``section.key=value`` override applied."""
    merged = {name: dict(values) for name, values in data.items() if isinstance(values, dict)}
    merged.update({k: v for k, v in data.items() if not isinstance(v, dict)})
    for text in overrides:
        section, key, value = parse_override(text)
        if section not in SECTIONS:
            raise ConfigError(f"Unknown section `[{section}]` in `--set {text}`.{_suggest(section, SECTIONS)}")
        valid = [f.name for f in dataclasses.fields(SECTIONS[section])]
        if key not in valid:
            raise ConfigError(f"Unknown key `[{section}] {key}` in `--set {text}`.{_suggest(key, valid)}")
        merged.setdefault(section, {})[key] = value
    return merged


def load_config(path: str | Path, overrides: list[str] | tuple[str, ...] = ()) -> Config:
    """Read, merge ``--set`` overrides into, and validate a TOML configuration file.

    Raises
    ------
    ConfigError
        If the file is missing, is not valid TOML, or any key or value is wrong.
    """
    path = Path(path).expanduser()
    if not path.is_file():
        raise ConfigError(f"Configuration file {str(path)!r} not found; check the path.")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path} is not valid TOML: {exc}.") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{path} is not a UTF-8 text file; save it as UTF-8 TOML.") from None
    data = apply_overrides(data, overrides)
    return Config.from_dict(data, base_dir=path.resolve().parent, source=str(path))


def coerce_config(config: Config | dict | str | Path, overrides=()) -> Config:
    """Accept a :class:`Config`, a nested dict or a path to a TOML file."""
    if isinstance(config, Config):
        if overrides:
            return Config.from_dict(apply_overrides(config.to_dict(), overrides))
        return config
    if isinstance(config, dict):
        return Config.from_dict(apply_overrides(config, overrides), source="the configuration dict")
    if isinstance(config, str | Path):
        return load_config(config, overrides)
    raise ConfigError(
        f"A configuration must be a path, a dict or a Config; got {type(config).__name__}."
    )
