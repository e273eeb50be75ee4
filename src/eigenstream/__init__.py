"""eigenstream: spectral embeddings (Laplacian eigenmaps, diffusion maps) of tables larger than memory.

Public names:

- :func:`run` -- run a configuration (a TOML path, a dict or a :class:`Config`) end to end.
- :func:`open_result` -- open a finished work directory: coordinates (zarr-backed), eigenvalues,
  residuals, manifest.
- :class:`SpectralMap` -- in-memory estimator (``fit`` / ``transform`` / ``fit_transform``) for
  arrays that fit in memory, built from the same numerical cores.
- :class:`Config`, :func:`load_config` and the exception types in :mod:`eigenstream.errors`.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("eigenstream")
except PackageNotFoundError:  # running from a source tree without installation
    __version__ = "0+unknown"

from eigenstream.api import open_result, run  # noqa: E402
from eigenstream.config import Config, load_config  # noqa: E402
from eigenstream.errors import (  # noqa: E402
    CheckpointError,
    ConfigError,
    EigenstreamError,
    InputError,
    NotConverged,
)
from eigenstream.estimator import SpectralMap  # noqa: E402

__all__ = [
    "CheckpointError",
    "Config",
    "ConfigError",
    "EigenstreamError",
    "InputError",
    "NotConverged",
    "SpectralMap",
    "__version__",
    "load_config",
    "open_result",
    "run",
]
