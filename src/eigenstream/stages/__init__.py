"""Stage runners: decide row blocks, submit dask tasks, write zarr, report progress.

Each module exposes ``STAGE`` (an :class:`eigenstream.pipeline.Stage`). Runners are the only
code that touches the work directory; the numerics live in :mod:`eigenstream.core`.
"""
