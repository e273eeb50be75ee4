"""Invented demo data: daily electricity load profiles of households in Kettleby.

Kettleby is a made-up, all-electric town. Each row is one household-day: 96 net-load
readings in kW, one per 15-minute slot starting at midnight, plus labels describing the
household and the day. Everything is generated in code from a seed; nothing here describes real
measurements.

The profiles carry structure a spectral map should recover:

* a continuous season cycle (day of year enters only through cosines, so 31 December
  and 1 January are neighbours): electric heating in winter mornings and evenings,
  air conditioning on summer afternoons, lighting that follows the sunset time, and
  night-time water heating that follows the later, lagging mains-water temperature.
  The drivers peak at different times of year, so the year is a closed loop;
* weekday versus weekend rhythm (later, broader morning peak at weekends);
* rooftop solar on some homes (midday net load pushed down, scaled by season and a
  random cloudiness of the day);
* an electric-vehicle charger in some homes (a large evening/night block on the days
  the car is plugged in);
* a per-household scale factor and small measurement noise.
"""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from eigenstream.errors import ConfigError
from eigenstream.io.atomic import atomic_path

__all__ = [
    "EV_SHARE",
    "ID_COLUMN",
    "LABEL_COLUMNS",
    "READING_COLUMNS",
    "SOLAR_SHARE",
    "make_load_profiles",
    "write_demo_table",
]

#: Reading column names, one per 15-minute slot: "kw_0000", "kw_0015", ..., "kw_2345".
READING_COLUMNS: tuple[str, ...] = tuple(
    f"kw_{hour:02d}{minute:02d}" for hour in range(24) for minute in (0, 15, 30, 45)
)
#: Label column names (not embedded; used to colour maps and to check them).
LABEL_COLUMNS: tuple[str, ...] = (
    "household",
    "day_of_year",
    "weekend",
    "solar",
    "ev_charger",
    "group",
)
#: Row identifier column written to the Parquet table.
ID_COLUMN = "row_id"

#: Share of households with rooftop solar (exact up to rounding of the household count).
SOLAR_SHARE = 0.30
#: Share of households with an electric-vehicle charger (drawn independently of solar).
EV_SHARE = 0.20

_DAYS_PER_YEAR = 365
# Kettleby's invented calendar year starts on a Monday (weekday 0); 5 and 6 are the weekend.
_WEEKDAY_OF_DAY_ONE = 0
# Slot midpoints in hours: a reading is the mean power over its 15 minutes.
_SLOT_HOURS = (np.arange(len(READING_COLUMNS)) + 0.5) * 0.25
# Random streams are drawn per fixed chunk of rows, so the rows produced for a seed do
# not depend on how a caller splits the work into blocks.
_CHUNK_ROWS = 4096
_HOUSEHOLD_STREAM = 1
_ROW_STREAM = 2
# Mean number of days recorded per household when the caller does not choose.
_DAYS_PER_HOUSEHOLD = 25


@dataclass(frozen=True)
class _Households:
    """Fixed per-household traits, one array entry per household."""

    scale: np.ndarray  # multiplies the whole consumption profile
    wake: np.ndarray  # weekday wake-up hour
    lie_in: np.ndarray  # extra hours of sleep at weekends
    heat_kw: np.ndarray  # electric heating power at full winter demand
    cool_kw: np.ndarray  # air-conditioning power at full summer demand
    water_kw: np.ndarray  # mean night-time water-heating power
    solar: np.ndarray  # bool
    solar_kwp: np.ndarray  # panel peak power (0 without solar)
    ev: np.ndarray  # bool
    ev_kw: np.ndarray  # charger power (0 without a charger)
    ev_start: np.ndarray  # usual plug-in hour
    ev_hours: np.ndarray  # usual charging duration
    ev_plug_prob: np.ndarray  # chance the car is plugged in on a given day


def _check_count(name: str, value: object, *, minimum: int) -> int:
    """Return ``value`` as an int, or raise ConfigError if it is not an integer >= minimum."""
    if isinstance(value, bool) or not isinstance(value, int | np.integer) or value < minimum:
        raise ConfigError(f"option {name}={value!r} must be an integer >= {minimum}")
    return int(value)


def _rng(seed: int, stream: int, index: int = 0) -> np.random.Generator:
    """Independent generator for one (seed, stream, index) triple."""
    return np.random.default_rng(np.random.SeedSequence([seed, stream, index]))


def _exact_share(rng: np.random.Generator, n: int, share: float) -> np.ndarray:
    """Boolean mask with exactly round(share * n) True entries at random positions."""
    mask = np.zeros(n, dtype=bool)
    mask[rng.permutation(n)[: int(round(share * n))]] = True
    return mask


def _draw_households(n_households: int, seed: int) -> _Households:
    """Draw the fixed traits of every household for one seed."""
    rng = _rng(seed, _HOUSEHOLD_STREAM)
    n = n_households
    solar = _exact_share(rng, n, SOLAR_SHARE)
    ev = _exact_share(rng, n, EV_SHARE)
    return _Households(
        scale=rng.lognormal(0.0, 0.15, n),
        wake=rng.normal(6.75, 0.4, n),
        lie_in=rng.normal(1.0, 0.25, n),
        heat_kw=rng.lognormal(np.log(1.6), 0.2, n),
        cool_kw=rng.lognormal(np.log(1.3), 0.25, n),
        water_kw=rng.lognormal(np.log(1.2), 0.15, n),
        solar=solar,
        solar_kwp=np.where(solar, rng.uniform(3.0, 6.0, n), 0.0),
        ev=ev,
        ev_kw=np.where(ev, rng.uniform(3.5, 7.2, n), 0.0),
        ev_start=rng.normal(21.5, 0.8, n),
        ev_hours=rng.uniform(2.0, 4.0, n),
        ev_plug_prob=rng.uniform(0.65, 0.9, n),
    )


def _bump(t: np.ndarray, centre: np.ndarray, width: np.ndarray | float) -> np.ndarray:
    """Gaussian-shaped bump of height 1 (rows x slots) from per-row centres."""
    return np.exp(-0.5 * ((t - centre[:, None]) / np.asarray(width)[..., None]) ** 2)


def _step(x: np.ndarray, width: float) -> np.ndarray:
    """Smooth 0 -> 1 step (logistic), so profiles have no jumps between slots."""
    return 0.5 * (1.0 + np.tanh(x / (2.0 * width)))


def _season(day_of_year: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Daylight, air warmth and mains-water coldness indices in [-1, 1] for each day.

    Daylight peaks at midsummer (day 172); air warmth lags it by about six weeks
    (peak day 218, a maritime climate); the mains water is coldest later still, in
    mid-March (day 74). Three drivers at different phases make the year trace a
    closed loop rather than a line.
    """
    turn = 2.0 * np.pi / _DAYS_PER_YEAR
    light = np.cos(turn * (day_of_year - 172))
    warmth = np.cos(turn * (day_of_year - 218))
    water_cold = np.cos(turn * (day_of_year - 74))
    return light, warmth, water_cold


def _chunk(house: _Households, seed: int, index: int) -> dict[str, np.ndarray]:
    """All columns of one fixed-size chunk of rows (rows index*_CHUNK_ROWS onwards)."""
    rng = _rng(seed, _ROW_STREAM, index)
    m = _CHUNK_ROWS
    t = _SLOT_HOURS[None, :]
    hh = rng.integers(0, house.scale.size, m)
    day = rng.integers(1, _DAYS_PER_YEAR + 1, m)
    weekend = (day - 1 + _WEEKDAY_OF_DAY_ONE) % 7 >= 5
    light, warmth, water_cold = _season(day.astype(np.float64))

    # Sun: day length 12 h +- 4.5 h, centred on 12:30 local time.
    day_length = 12.0 + 4.5 * light
    sunrise = 12.5 - day_length / 2.0
    sunset = 12.5 + day_length / 2.0

    wake = house.wake[hh] + np.where(weekend, house.lie_in[hh], 0.0) + rng.normal(0, 0.25, m)
    use = 0.25 + 0.9 * np.where(weekend, 0.8, 1.0)[:, None] * _bump(
        t, wake + 0.75, np.where(weekend, 1.2, 0.7)
    )
    use += np.where(weekend, 0.4, 0.15)[:, None] * _bump(t, np.full(m, 13.0), 2.0)
    use += 1.1 * _bump(t, np.full(m, 18.5) + rng.normal(0, 0.3, m), 1.2)
    # Lights: on from sunset until bedtime, and between waking and sunrise.
    use += 0.9 * _step(t - sunset[:, None], 0.3) * _step(23.3 - t, 0.3)
    use += 0.5 * _step(t - wake[:, None], 0.2) * _step(sunrise[:, None] - t, 0.3)

    # Heating follows cold days (low warmth): a night setback plus morning/evening peaks.
    heat = (1.0 - warmth) / 2.0 * house.heat_kw[hh]
    use += heat[:, None] * (
        0.4 + _bump(t, wake + 0.5, 1.3) + 1.1 * _bump(t, np.full(m, 19.5), 2.2)
    )
    # Air conditioning only on the warmest days, afternoon-centred.
    cool = ((1.0 + warmth) / 2.0) ** 1.5 * house.cool_kw[hh]
    use += 1.6 * cool[:, None] * _bump(t, np.full(m, 15.5), 2.6)
    # Hot-water cylinder on the cheap night tariff (01:00-04:30): colder mains water
    # needs more energy.
    water = house.water_kw[hh] * (1.0 + 0.7 * water_cold)
    use += water[:, None] * _step(t - 1.0, 0.15) * _step(4.5 - t, 0.15)
    # Two appliance runs (kettle, washing machine, oven) at random daytime hours.
    for _ in range(2):
        use += rng.lognormal(np.log(0.3), 0.3, m)[:, None] * _bump(
            t, rng.uniform(7.0, 22.0, m), 0.4
        )
    use *= house.scale[hh][:, None]

    # Solar: a half-sine between sunrise and sunset, taller in summer, dimmed by cloud.
    cloud = np.clip(rng.beta(2.0, 3.0, m) + 0.15 * (1.0 - light) / 2.0, 0.0, 1.0)
    sun_phase = np.clip((t - sunrise[:, None]) / day_length[:, None], 0.0, 1.0)
    solar = (
        (house.solar_kwp[hh] * (0.55 + 0.45 * light) * (1.0 - 0.75 * cloud))[:, None]
        * 0.75
        * np.sin(np.pi * sun_phase) ** 1.3
    )

    # EV charging: a smooth block from the plug-in hour, wrapping past midnight.
    plugged = rng.random(m) < house.ev_plug_prob[hh]
    start = house.ev_start[hh] + rng.normal(0, 0.5, m)
    hours = house.ev_hours[hh] * rng.uniform(0.7, 1.3, m)
    since_plug = (t - start[:, None] + 12.0) % 24.0 - 12.0
    charge = (house.ev_kw[hh] * plugged)[:, None] * (
        _step(since_plug, 0.1) * _step(hours[:, None] - since_plug, 0.1)
    )

    noise = rng.normal(0.0, 0.04, (m, t.size))
    readings = (use - solar + charge + noise).astype(np.float32)

    solar_flag = house.solar[hh]
    ev_flag = house.ev[hh]
    group = np.where(
        solar_flag,
        np.where(ev_flag, "solar+ev", "solar"),
        np.where(ev_flag, "ev", "plain"),
    ).astype("<U8")
    return {
        "readings": readings,
        "household": hh.astype(np.int32),
        "day_of_year": day.astype(np.int16),
        "weekend": weekend,
        "solar": solar_flag.copy(),
        "ev_charger": ev_flag.copy(),
        "group": group,
    }


def _rows(house: _Households, seed: int, start: int, stop: int) -> dict[str, np.ndarray]:
    """Columns for rows start..stop-1 (readings as one float32 matrix)."""
    first, last = start // _CHUNK_ROWS, (stop - 1) // _CHUNK_ROWS
    parts = [_chunk(house, seed, index) for index in range(first, last + 1)]
    lo = start - first * _CHUNK_ROWS
    hi = lo + (stop - start)
    out = {key: np.concatenate([p[key] for p in parts])[lo:hi] for key in parts[0]}
    out[ID_COLUMN] = np.arange(start, stop, dtype=np.int64)
    return out


def _households_for(n_rows: int, n_households: int | None, seed: int) -> _Households:
    """Household traits for a table of n_rows rows."""
    if n_households is None:
        n_households = max(1, n_rows // _DAYS_PER_HOUSEHOLD)
    n_households = _check_count("n_households", n_households, minimum=1)
    return _draw_households(n_households, seed)


def make_load_profiles(
    n_rows: int, *, seed: int = 0, n_households: int | None = None
) -> dict[str, np.ndarray]:
    """Generate invented household-day load profiles for the town of Kettleby.

    Parameters
    ----------
    n_rows : int
        Number of household-days (rows), >= 1.
    seed : int, default 0
        Non-negative seed; the same seed (and row count) gives identical output.
    n_households : int, optional
        Number of distinct households; default ``max(1, n_rows // 25)``.

    Returns
    -------
    dict of str to ndarray
        One float32 array of length ``n_rows`` per name in :data:`READING_COLUMNS`
        (net load in kW, negative when solar export exceeds use); the labels
        ``household`` (int32), ``day_of_year`` (int16, 1..365), ``weekend``, ``solar``,
        ``ev_charger`` (bool), ``group`` (str: "plain", "solar", "ev" or "solar+ev");
        and ``row_id`` (int64, 0..n_rows-1).
    """
    n_rows = _check_count("n_rows", n_rows, minimum=1)
    seed = _check_count("seed", seed, minimum=0)
    house = _households_for(n_rows, n_households, seed)
    rows = _rows(house, seed, 0, n_rows)
    readings = rows.pop("readings")
    out = {name: np.ascontiguousarray(readings[:, j]) for j, name in enumerate(READING_COLUMNS)}
    out.update(rows)
    return out


def write_demo_table(
    path: str | os.PathLike,
    n_rows: int,
    *,
    seed: int = 0,
    block_rows: int = 50_000,
    n_households: int | None = None,
) -> Path:
    """Write the Kettleby load profiles to a Parquet file, one block of rows at a time.

    Parameters
    ----------
    path : str or path-like
        Output file; replaced atomically when complete.
    n_rows : int
        Number of household-days, >= 1.
    seed : int, default 0
        Non-negative seed; the file holds exactly ``make_load_profiles(n_rows, seed=seed)``.
    block_rows : int, default 50_000
        Rows generated and written per block (also the Parquet row-group size).
    n_households : int, optional
        As in :func:`make_load_profiles`.

    Returns
    -------
    Path
        The written file. Columns: ``row_id``, the readings, then the labels.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    n_rows = _check_count("n_rows", n_rows, minimum=1)
    seed = _check_count("seed", seed, minimum=0)
    block_rows = _check_count("block_rows", block_rows, minimum=1)
    house = _households_for(n_rows, n_households, seed)

    schema = pa.schema(
        [pa.field(ID_COLUMN, pa.int64())]
        + [pa.field(name, pa.float32()) for name in READING_COLUMNS]
        + [
            pa.field("household", pa.int32()),
            pa.field("day_of_year", pa.int16()),
            pa.field("weekend", pa.bool_()),
            pa.field("solar", pa.bool_()),
            pa.field("ev_charger", pa.bool_()),
            pa.field("group", pa.string()),
        ]
    )
    path = Path(path)
    with atomic_path(path) as tmp, pq.ParquetWriter(tmp, schema) as writer:
        for start in range(0, n_rows, block_rows):
            rows = _rows(house, seed, start, min(start + block_rows, n_rows))
            readings = rows.pop("readings")
            arrays = [pa.array(rows[ID_COLUMN])]
            arrays += [pa.array(readings[:, j]) for j in range(readings.shape[1])]
            arrays += [pa.array(rows[name]) for name in LABEL_COLUMNS]
            writer.write_table(pa.Table.from_arrays(arrays, schema=schema))
    return path
