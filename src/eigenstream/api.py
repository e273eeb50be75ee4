"""Python entry points: run a configuration, open a finished work directory."""

from __future__ import annotations

from dataclasses import dataclass
from functools import cached_property
from pathlib import Path
from typing import Any

import numpy as np

from eigenstream.config import Config
from eigenstream.errors import CheckpointError
from eigenstream.io import store
from eigenstream.pipeline import run_pipeline, status
from eigenstream.workdir import Workdir, read_json


@dataclass(frozen=True)
class Result:
    """A finished run, read from its work directory.

    Attributes
    ----------
    workdir : Path
        The run's work directory.
    coordinates : zarr.Array
        (n_rows, components) map coordinates in input order; slice it like a numpy array.
    eigenvalues, residuals : ndarray
        Eigenvalues of the normalised affinity (descending, trivial one excluded) and the
        relative residual of each eigenpair.
    ids : ndarray or None
        Row ids from ``[input] id_column``, in input order.
    manifest : dict
        Config, versions, seed, row count and timings of the run.
    """

    workdir: Path

    @cached_property
    def _wd(self) -> Workdir:
        return Workdir(self.workdir)

    @property
    def coordinates(self):
        return store.open_group(self._wd.stage_store("extend"), mode="r")["coordinates"]

    @property
    def eigenvalues(self) -> np.ndarray:
        return np.asarray(store.open_group(self._wd.stage_store("solve"), mode="r")["eigenvalues"][...])

    @property
    def residuals(self) -> np.ndarray:
        return np.asarray(store.open_group(self._wd.stage_store("solve"), mode="r")["residuals"][...])

    @property
    def ids(self) -> np.ndarray | None:
        group = store.open_group(self._wd.stage_store("read"), mode="r")
        return store.read_labels(group["ids"]) if "ids" in group else None

    @property
    def manifest(self) -> dict[str, Any]:
        return read_json(self._wd.path / "manifest.json") or {}

    def status(self) -> dict[str, Any]:
        """The same information as ``eigenstream status WORKDIR --json``."""
        return status(self.workdir)


def open_result(workdir: str | Path) -> Result:
    """Open the finished run in ``workdir``.

    Raises
    ------
    CheckpointError
        If the directory holds no run, or a run that did not complete.
    """
    info = status(workdir)
    if not info["complete"]:
        pending = [k for k, v in info["stages"].items() if v != "done"]
        raise CheckpointError(
            f"The run in {str(workdir)!r} is not complete (state {info['state']!r}; stages not "
            f"done: {', '.join(pending)}); run `eigenstream run` with its config to finish it."
        )
    return Result(Path(workdir).resolve())


def run(
    config: Config | dict | str | Path,
    *,
    overrides=(),
    progress: bool = True,
    fresh: bool = False,
    verify: bool = False,
) -> Result:
    """Run ``config`` end to end (reusing finished stages) and return its :class:`Result`.

    Parameters
    ----------
    config : Config, dict or path-like
        A validated :class:`Config`, a nested ``{section: {key: value}}`` dict or a TOML file.
    overrides : sequence of str, optional
        ``section.key=value`` strings applied on top, as ``--set`` does.
    progress : bool, default=True
        Show progress bars on stderr.
    fresh : bool, default=False
        Discard whatever an earlier run left in the work directory first.
    verify : bool, default=False
        Read back every finished block of an unfinished stage before reusing it.
    """
    workdir = run_pipeline(config, overrides=overrides, show_progress=progress, fresh=fresh,
                           verify_all=verify)
    return open_result(workdir)
