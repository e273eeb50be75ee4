"""Per-column mean and variance accumulated over row blocks in one pass.

Blocks are merged with the pairwise update of Chan, Golub & LeVeque (1979), which stays
accurate when the mean is large compared with the spread.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class ColumnMoments:
    """Running count, mean and sum of squared deviations of each column."""

    n_columns: int
    count: int = 0
    mean: np.ndarray = field(init=False)
    m2: np.ndarray = field(init=False)

    def __post_init__(self) -> None:
        self.mean = np.zeros(self.n_columns)
        self.m2 = np.zeros(self.n_columns)

    def update(self, block: np.ndarray) -> None:
        """Fold a block of rows (m, n_columns) into the running moments."""
        m = block.shape[0]
        if m == 0:
            return
        block = np.asarray(block, dtype=np.float64)
        b_mean = block.mean(axis=0)
        b_m2 = ((block - b_mean) ** 2).sum(axis=0)
        total = self.count + m
        delta = b_mean - self.mean
        self.mean = self.mean + delta * (m / total)
        self.m2 = self.m2 + b_m2 + delta**2 * (self.count * m / total)
        self.count = total

    @property
    def std(self) -> np.ndarray:
        """Population standard deviation of each column."""
        if self.count == 0:
            return np.zeros(self.n_columns)
        return np.sqrt(self.m2 / self.count)


def standardizer(mean: np.ndarray, std: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Shift and scale that map columns to zero mean and unit variance.

    Constant columns (std 0) get scale 1, so they become all-zero instead of dividing by 0.
    """
    std = np.asarray(std, dtype=np.float64)
    scale = np.where(std > 0, std, 1.0)
    return np.asarray(mean, dtype=np.float64), scale
