"""Synthetic manifold tables for the benchmarks, written to zarr block by block.

Points on a smooth 2-D sheet (a rolled, twisted rectangle) mapped into D dimensions by a fixed
random smooth map, plus Gaussian noise; float32; seeded. Any number of rows is generated in
blocks, so a table larger than memory can be written.

Usage: .venv/bin/python bench/manifold_data.py OUT.zarr --rows 1000000 [--columns 50]
"""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np
import zarr

BLOCK = 250_000


def sheet_block(start: int, stop: int, *, columns: int, seed: int, noise: float) -> np.ndarray:
    """Rows start:stop of the table (deterministic for a seed, whatever the block size)."""
    rng = np.random.default_rng([seed, start])
    m = stop - start
    u, v = rng.uniform(0, 1, m), rng.uniform(0, 1, m)
    # a smooth 3-D sheet: a roll in u, a gentle twist in v
    angle = 1.5 * np.pi * (1 + 2 * u)
    base = np.c_[angle * np.cos(angle), 20 * v, angle * np.sin(angle) + 3 * np.sin(np.pi * v)]
    proj = np.random.default_rng(seed).standard_normal((3, columns)) / np.sqrt(3)
    bend = np.random.default_rng(seed + 1).standard_normal((2, columns))
    X = base @ proj + np.sin(np.c_[u, v] * np.pi) @ bend
    X += noise * rng.standard_normal(X.shape)
    return X.astype(np.float32)


def write_table(path: str | Path, rows: int, *, columns: int = 50, seed: int = 0,
                noise: float = 0.05, chunk_rows: int = 100_000) -> Path:
    """Write ``rows`` x ``columns`` float32 rows to a zarr array at ``path``."""
    arr = zarr.create_array(str(path), shape=(rows, columns), chunks=(chunk_rows, columns),
                            dtype="float32", compressors=None, overwrite=True)
    for start in range(0, rows, BLOCK):
        stop = min(rows, start + BLOCK)
        arr[start:stop] = sheet_block(start, stop, columns=columns, seed=seed, noise=noise)
    return Path(path)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out")
    parser.add_argument("--rows", type=int, required=True)
    parser.add_argument("--columns", type=int, default=50)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    print(write_table(args.out, args.rows, columns=args.columns, seed=args.seed))


if __name__ == "__main__":
    main()
