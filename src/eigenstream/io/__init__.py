"""Reading input tables block by block and writing embedding coordinates.

:mod:`eigenstream.io.readers` streams rows out of ``.npy``, zarr, HDF5, CSV and Parquet
inputs as :class:`~eigenstream.io.readers.RowBlock` objects without loading the whole
table; :mod:`eigenstream.io.export` writes coordinates to ``.npy``, Parquet or CSV.
"""
