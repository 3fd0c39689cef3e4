"""The demo scenario: parcel-delivery runs with planted, documented problems.

Every value comes from our own generator below with a fixed seed; the table describes no
real people or firms. One row is one delivery run of one vehicle from one depot.

True model (before the planted errors)::

    mean = 6 + 2.4 * stops + 0.15 * weight_kg
             + 90 * (1 - exp(-distance_km / 25)) + 0.8 * distance_km
             + vehicle offset (van 0, cargo_bike +3, truck +5)
             + 6 if depot == "east" else 0
    minutes = mean + (1 + 0.12 * mean) * z,    z ~ N(0, 1)

`hour` has no effect. The planted problems are listed, with how to find them, in `PLANTED`.

Rows are produced in fixed logical blocks of `LOGICAL_BLOCK_ROWS` rows, block `b` drawing
from ``SeedSequence(seed, spawn_key=(0, b))`` (the `b`-th child of ``SeedSequence(seed)``
in stream 0), so the same ``(n_rows, seed)`` gives the same rows however they are chunked
or written. The planted rows sit at positions drawn from ``SeedSequence(seed,
spawn_key=(1, n_rows))``: one per equal stretch of the file, so they are spread from the
start to the very end.
"""

from __future__ import annotations

import os
import secrets
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Final, Literal

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.parquet as pq

from triage.data.base import check_count
from triage.errors import DataError, ExportError

SCENARIO_SCHEMA: Final = pl.Schema(
    {
        "delivery_id": pl.Int64,
        "depot": pl.String,
        "vehicle": pl.String,
        "hour": pl.Int64,
        "distance_km": pl.Float64,
        "stops": pl.Int64,
        "weight_kg": pl.Float64,
        "minutes": pl.Float64,
    }
)
"""Column names and polars dtypes of the scenario table, in file order."""

SCENARIO_COLUMNS: Final[tuple[str, ...]] = tuple(SCENARIO_SCHEMA.names())
"""Column names of the scenario table, in file order."""

FIRST_DELIVERY_ID: Final = 1_000_001
"""`delivery_id` of the row at position 0; the row at position `i` has ``FIRST_DELIVERY_ID + i``."""

DEPOTS: Final[tuple[str, ...]] = ("north", "south", "east", "west", "harbour", "airport")
"""Depot levels; `airport` is the rare level."""

DEPOT_SHARES: Final[tuple[float, ...]] = (0.27, 0.24, 0.20, 0.16, 0.126, 0.004)
"""Probability of each level of `DEPOTS` (`airport`: 0.4 % of rows)."""

BIASED_DEPOT: Final = "east"
"""The depot whose runs take `DEPOT_BIAS_MINUTES` longer than the other terms explain."""

DEPOT_BIAS_MINUTES: Final = 6.0
"""Systematic extra minutes on every run from `BIASED_DEPOT`."""

VEHICLES: Final[tuple[str, ...]] = ("van", "cargo_bike", "truck")
"""Vehicle levels."""

VEHICLE_SHARES: Final[tuple[float, ...]] = (0.62, 0.23, 0.15)
"""Probability of each level of `VEHICLES`."""

VEHICLE_MINUTES: Final[tuple[float, ...]] = (0.0, 3.0, 5.0)
"""Extra minutes of each level of `VEHICLES` (loading and parking)."""

GROSS_ERRORS_PER_100K: Final = 40
"""Rows per 100,000 whose `minutes` were recorded in seconds (the true value times 60)."""

LEVERAGE_PER_100K: Final = 30
"""Rows per 100,000 in the long-haul cluster (very long distance, very heavy load)."""

MISSING_SHARE: Final = 0.005
"""Share of rows with `distance_km` missing, and independently with `weight_kg` missing."""

LOGICAL_BLOCK_ROWS: Final = 65_536
"""Rows drawn from one random stream; part of the scenario's definition (changing it changes
the data), unrelated to the chunk size callers ask for."""

_BLOCK_STREAM: Final = 0
_PLANTED_STREAM: Final = 1


@dataclass(frozen=True, slots=True)
class PlantedProblem:
    """One problem planted in the scenario on purpose."""

    name: str
    """Short identifier, also a heading of `sample_parquet/README.md`."""
    columns: tuple[str, ...]
    """Columns involved."""
    planted: str
    """What was planted, and where."""
    reveal: str
    """How a careful analysis (and triage) should bring it to light."""


PLANTED: Final[tuple[PlantedProblem, ...]] = (
    PlantedProblem(
        name="curved-distance",
        columns=("distance_km", "minutes"),
        planted=(
            "minutes rise with distance along 90 * (1 - exp(-distance_km / 25)) "
            "+ 0.8 * distance_km: about 4.4 min/km for short runs, under 1 min/km past 100 km"
        ),
        reveal=(
            "a straight-line distance term leaves an arch in residuals against distance_km "
            "and against fitted values; a squared or log distance term is clearly significant"
        ),
    ),
    PlantedProblem(
        name="growing-spread",
        columns=("minutes",),
        planted="noise SD is 1 + 0.12 * (expected minutes), so long runs scatter more",
        reveal=(
            "residual spread widens with the fitted value (a funnel); Breusch-Pagan rejects "
            "and HC3 standard errors differ from the classical ones"
        ),
    ),
    PlantedProblem(
        name="seconds-as-minutes",
        columns=("minutes",),
        planted=(
            f"about {GROSS_ERRORS_PER_100K} rows per 100,000 have minutes recorded in seconds "
            "(true value times 60), spread evenly through the file"
        ),
        reveal=(
            "the largest absolute and studentized residuals, far out in the histogram tail; "
            "their minutes are about 60 times what similar runs take"
        ),
    ),
    PlantedProblem(
        name="east-depot-bias",
        columns=("depot", "minutes"),
        planted=f"runs from depot `{BIASED_DEPOT}` take {DEPOT_BIAS_MINUTES:g} minutes longer",
        reveal=(
            "without a depot term the `east` segment has a clearly positive mean residual; "
            "with one, its coefficient is about +6 against the others near 0"
        ),
    ),
    PlantedProblem(
        name="long-haul-cluster",
        columns=("distance_km", "weight_kg", "stops", "vehicle"),
        planted=(
            f"about {LEVERAGE_PER_100K} rows per 100,000 are truck runs of 160-240 km with "
            "900-1500 kg and 1-3 stops; their minutes follow the true model, so they are "
            "genuine, not errors"
        ),
        reveal=(
            "the highest leverage; under a straight-line distance term they sit far below "
            "the fit (about -100 minutes) and have the largest Cook's distances, dragging "
            "the weight_kg slope from 0.15 to about 0.06"
        ),
    ),
    PlantedProblem(
        name="rare-airport-depot",
        columns=("depot",),
        planted="depot `airport` holds about 0.4 % of rows (no effect of its own)",
        reveal=(
            "a level with few rows: its coefficient has a wide interval, and a small sample "
            "may miss it altogether"
        ),
    ),
    PlantedProblem(
        name="missing-values",
        columns=("distance_km", "weight_kg"),
        planted=(
            "about 0.5 % of distance_km and, independently, 0.5 % of weight_kg are missing, "
            "completely at random (never on the planted rows)"
        ),
        reveal="about 1 % of rows are dropped for missing values when both columns are used",
    ),
)
"""The planted problems, in the order the README lists them."""


@dataclass(frozen=True, slots=True)
class PlantedRows:
    """Positions (0-based, in file order) of the planted rows for one ``(n_rows, seed)``."""

    gross_errors: np.ndarray
    """Sorted int64 positions of the `seconds-as-minutes` rows."""
    leverage: np.ndarray
    """Sorted int64 positions of the `long-haul-cluster` rows."""


def _check_size(n_rows: int, seed: int) -> None:
    check_count("n_rows", n_rows, error=DataError, advice="; ask for at least one row")
    check_count("seed", seed, minimum=0, error=DataError)


def _planted_count(n_rows: int, per_100k: int) -> int:
    """Planted rows for a file of `n_rows`: the rate, rounded, and at least one from 1,000 rows."""
    count = round(n_rows * per_100k / 100_000)
    return max(count, 1) if n_rows >= 1_000 else count


def planted_positions(n_rows: int, *, seed: int = 0) -> PlantedRows:
    """Return where the gross errors and the long-haul cluster sit in a scenario file.

    The file is cut into as many equal stretches as there are planted rows, one planted row
    is drawn uniformly inside each stretch, and the stretches are dealt at random between
    the two problems. So planted rows are distinct, spread through the whole file, and one
    always sits in the last stretch.

    Parameters
    ----------
    n_rows : int
        Rows in the file.
    seed : int, default=0
        Scenario seed.

    Returns
    -------
    PlantedRows
        Sorted positions of both kinds of planted rows.

    Raises
    ------
    DataError
        If `n_rows` is below 1 or `seed` is negative.
    """
    _check_size(n_rows, seed)
    n_errors = _planted_count(n_rows, GROSS_ERRORS_PER_100K)
    n_leverage = _planted_count(n_rows, LEVERAGE_PER_100K)
    n_planted = n_errors + n_leverage
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(_PLANTED_STREAM, n_rows)))
    edges = (np.arange(n_planted + 1, dtype=np.int64) * n_rows) // max(n_planted, 1)
    widths = np.diff(edges)
    positions = edges[:-1] + (rng.random(n_planted) * widths).astype(np.int64)
    is_leverage = np.zeros(n_planted, dtype=bool)
    is_leverage[rng.permutation(n_planted)[:n_leverage]] = True
    return PlantedRows(gross_errors=positions[~is_leverage], leverage=positions[is_leverage])


def _mean_minutes(
    distance_km: np.ndarray,
    stops: np.ndarray,
    weight_kg: np.ndarray,
    vehicle_code: np.ndarray,
    depot_code: np.ndarray,
) -> np.ndarray:
    """Return the true model's expected minutes from arrays (categories as level codes)."""
    curve = 90.0 * -np.expm1(-distance_km / 25.0) + 0.8 * distance_km
    mean = 6.0 + 2.4 * stops + 0.15 * weight_kg + curve
    mean = mean + np.asarray(VEHICLE_MINUTES)[vehicle_code]
    biased: np.ndarray = depot_code == DEPOTS.index(BIASED_DEPOT)
    return np.asarray(mean + DEPOT_BIAS_MINUTES * biased, dtype=np.float64)


def expected_minutes(frame: pl.DataFrame) -> np.ndarray:
    """Return the true model's expected `minutes` for each row of a scenario frame.

    Parameters
    ----------
    frame : pl.DataFrame
        Rows with `distance_km`, `stops`, `weight_kg`, `vehicle` and `depot`.

    Returns
    -------
    ndarray of shape (frame.height,)
        Expected minutes; NaN where `distance_km` or `weight_kg` is missing.
    """
    depot_code = frame["depot"].replace_strict(DEPOTS, range(len(DEPOTS))).to_numpy()
    vehicle_code = frame["vehicle"].replace_strict(VEHICLES, range(len(VEHICLES))).to_numpy()
    return _mean_minutes(
        frame["distance_km"].cast(pl.Float64).to_numpy(),
        frame["stops"].cast(pl.Float64).to_numpy(),
        frame["weight_kg"].cast(pl.Float64).to_numpy(),
        vehicle_code.astype(np.int64),
        depot_code.astype(np.int64),
    )


@dataclass(frozen=True, slots=True)
class _LongHaul:
    """Covariates of the long-haul rows, drawn once per file."""

    positions: np.ndarray
    distance_km: np.ndarray
    stops: np.ndarray
    weight_kg: np.ndarray


def _draw_long_haul(planted: PlantedRows, seed: int, n_rows: int) -> _LongHaul:
    ss = np.random.SeedSequence(seed, spawn_key=(_PLANTED_STREAM, n_rows, 1))
    rng = np.random.default_rng(ss)
    n = planted.leverage.size
    return _LongHaul(
        positions=planted.leverage,
        distance_km=np.round(rng.uniform(160.0, 240.0, n), 2),
        stops=rng.integers(1, 4, n),
        weight_kg=np.round(rng.uniform(900.0, 1500.0, n), 1),
    )


_DEPOT_LEVELS: Final = pl.Series("depot", DEPOTS, dtype=pl.String)
_VEHICLE_LEVELS: Final = pl.Series("vehicle", VEHICLES, dtype=pl.String)
_TRUCK: Final = VEHICLES.index("truck")
_CARGO_BIKE: Final = VEHICLES.index("cargo_bike")


def _in_block(positions: np.ndarray, start: int, stop: int) -> np.ndarray:
    """Return the indices into sorted `positions` of the values in ``[start, stop)``."""
    lo, hi = np.searchsorted(positions, [start, stop])
    return np.arange(lo, hi)


def _generate_block(
    block_index: int, seed: int, planted: PlantedRows, long_haul: _LongHaul
) -> pl.DataFrame:
    """Draw logical block `block_index` in full (`LOGICAL_BLOCK_ROWS` rows)."""
    n = LOGICAL_BLOCK_ROWS
    start = block_index * n
    ss = np.random.SeedSequence(seed, spawn_key=(_BLOCK_STREAM, block_index))
    rng = np.random.default_rng(ss)
    depot = rng.choice(len(DEPOTS), size=n, p=DEPOT_SHARES)
    vehicle = rng.choice(len(VEHICLES), size=n, p=VEHICLE_SHARES)
    hour = rng.integers(7, 21, size=n)
    # cargo bikes work short inner-city rounds; vans and trucks range further
    distance_scale = np.where(vehicle == _CARGO_BIKE, 2.5, 7.0)
    distance = np.round(np.maximum(rng.gamma(2.2, distance_scale), 0.2), 2)
    stops = 1 + np.minimum(rng.poisson(2.0 + 0.35 * distance), 79)
    load_factor = np.where(vehicle == _TRUCK, 2.5, 1.0)
    weight = np.round(0.2 + rng.gamma(2.0, 2.5 + 0.9 * stops) * load_factor, 1)
    z = rng.standard_normal(n)
    u_distance = rng.random(n)
    u_weight = rng.random(n)

    local = _in_block(long_haul.positions, start, start + n)
    rows = long_haul.positions[local] - start
    vehicle[rows] = _TRUCK
    distance[rows] = long_haul.distance_km[local]
    stops[rows] = long_haul.stops[local]
    weight[rows] = long_haul.weight_kg[local]

    mean = _mean_minutes(distance, stops, weight, vehicle, depot)
    minutes = np.round(np.maximum(mean + (1.0 + 0.12 * mean) * z, 1.0), 1)
    error_rows = planted.gross_errors[_in_block(planted.gross_errors, start, start + n)] - start
    minutes[error_rows] = minutes[error_rows] * 60.0

    keep = np.ones(n, dtype=bool)
    keep[rows] = False
    keep[error_rows] = False
    distance_missing = (u_distance < MISSING_SHARE) & keep
    weight_missing = (u_weight < MISSING_SHARE) & keep
    return pl.DataFrame(
        [
            pl.Series("delivery_id", np.arange(start, start + n) + FIRST_DELIVERY_ID),
            _DEPOT_LEVELS.gather(depot).alias("depot"),
            _VEHICLE_LEVELS.gather(vehicle).alias("vehicle"),
            pl.Series("hour", hour.astype(np.int64)),
            pl.Series("distance_km", np.where(distance_missing, np.nan, distance)),
            pl.Series("stops", stops.astype(np.int64)),
            pl.Series("weight_kg", np.where(weight_missing, np.nan, weight)),
            pl.Series("minutes", minutes),
        ]
    ).with_columns(pl.col("distance_km", "weight_kg").fill_nan(None))


def iter_scenario(
    n_rows: int, *, seed: int = 0, block_rows: int = LOGICAL_BLOCK_ROWS
) -> Iterator[pl.DataFrame]:
    """Yield the scenario table in frames of `block_rows` rows (the last may be shorter).

    Only about one chunk and one logical block are in memory at a time. The rows depend
    on ``(n_rows, seed)`` only, never on `block_rows`.

    Parameters
    ----------
    n_rows : int
        Rows in the whole table.
    seed : int, default=0
        Scenario seed.
    block_rows : int, default=LOGICAL_BLOCK_ROWS
        Rows per yielded frame.

    Yields
    ------
    pl.DataFrame
        Consecutive rows with the columns and dtypes of `SCENARIO_SCHEMA`.

    Raises
    ------
    DataError
        If `n_rows` or `block_rows` is below 1 or `seed` is negative.

    See Also
    --------
    write_scenario : the same rows written to Parquet or CSV.
    planted_positions : where the gross errors and the long-haul rows sit.
    """
    _check_size(n_rows, seed)
    check_count("block_rows", block_rows, error=DataError)
    planted = planted_positions(n_rows, seed=seed)
    long_haul = _draw_long_haul(planted, seed, n_rows)
    cached_index = -1
    cached = pl.DataFrame(schema=SCENARIO_SCHEMA)
    for start in range(0, n_rows, block_rows):
        stop = min(start + block_rows, n_rows)
        parts = []
        for index in range(start // LOGICAL_BLOCK_ROWS, (stop - 1) // LOGICAL_BLOCK_ROWS + 1):
            if index != cached_index:
                cached = _generate_block(index, seed, planted, long_haul)
                cached_index = index
            base = index * LOGICAL_BLOCK_ROWS
            lo = max(start, base) - base
            hi = min(stop, base + LOGICAL_BLOCK_ROWS) - base
            parts.append(cached.slice(lo, hi - lo))
        yield parts[0] if len(parts) == 1 else pl.concat(parts, rechunk=True)


ScenarioFormat = Literal["parquet", "csv"]

_FORMATS: Final[dict[str, ScenarioFormat]] = {
    ".parquet": "parquet",
    ".pq": "parquet",
    ".csv": "csv",
}

_ARROW_SCHEMA: Final = pa.schema(
    [
        ("delivery_id", pa.int64()),
        ("depot", pa.string()),
        ("vehicle", pa.string()),
        ("hour", pa.int64()),
        ("distance_km", pa.float64()),
        ("stops", pa.int64()),
        ("weight_kg", pa.float64()),
        ("minutes", pa.float64()),
    ]
)


def scenario_format(path: str | os.PathLike[str]) -> ScenarioFormat:
    """Return the file format `write_scenario` uses for `path`, from its extension.

    Raises
    ------
    ExportError
        If the extension is not `.parquet`, `.pq` or `.csv`.
    """
    suffix = Path(path).suffix.lower()
    if suffix not in _FORMATS:
        msg = (
            f"cannot tell the format of `{path}` from its extension `{suffix}`; "
            "use a name ending in `.parquet` (or `.pq`) or `.csv`"
        )
        raise ExportError(msg)
    return _FORMATS[suffix]


def write_scenario(
    path: str | os.PathLike[str],
    *,
    n_rows: int,
    seed: int = 0,
    row_group_rows: int = 131_072,
    force: bool = False,
    on_progress: Callable[[int, int], None] | None = None,
) -> Path:
    """Write the scenario table to a Parquet or CSV file, streaming one chunk at a time.

    The file is written to a temporary file beside `path`, then renamed into place, so a
    stopped run never leaves a partial file under the final name.

    Parameters
    ----------
    path : str or PathLike
        Output file; `.parquet`/`.pq` writes Parquet (zstd), `.csv` writes CSV with a header
        and empty fields for missing values.
    n_rows : int
        Rows to write.
    seed : int, default=0
        Scenario seed.
    row_group_rows : int, default=131_072
        Rows per Parquet row group (and per chunk written to CSV).
    force : bool, default=False
        Replace `path` if it exists.
    on_progress : callable, optional
        Called after each chunk as ``on_progress(rows_written, n_rows)``.

    Returns
    -------
    Path
        The written file.

    Raises
    ------
    ExportError
        If `path` exists and `force` is False, its extension is unknown, or writing fails.
    DataError
        If `n_rows` or `row_group_rows` is below 1 or `seed` is negative.

    See Also
    --------
    iter_scenario : the same rows as polars frames.
    """
    target = Path(path)
    fmt = scenario_format(target)
    _check_size(n_rows, seed)
    check_count("row_group_rows", row_group_rows, error=DataError)
    if target.exists() and not force:
        msg = f"`{target}` already exists; choose another name or pass `--force` to replace it"
        raise ExportError(msg)
    if not target.parent.is_dir():
        msg = f"cannot write `{target}`: folder `{target.parent}` does not exist; create it first"
        raise ExportError(msg)
    chunks = iter_scenario(n_rows, seed=seed, block_rows=row_group_rows)
    tmp = target.with_name(f".{target.name}.{secrets.token_hex(6)}.part")
    try:
        # O_EXCL never touches another file; mode 0o666 lets the umask decide, as for any
        # new file (tempfile.mkstemp would leave the result readable by its owner only)
        os.close(os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o666))
    except OSError as error:
        raise _write_error(target, error) from error
    try:
        if fmt == "parquet":
            _write_parquet(tmp, chunks, n_rows, row_group_rows, on_progress)
        else:
            _write_csv(tmp, chunks, n_rows, on_progress)
        if target.exists() and not force:
            msg = f"`{target}` appeared while writing; choose another name or pass `--force`"
            raise ExportError(msg)
        tmp.replace(target)
    except ExportError:
        tmp.unlink(missing_ok=True)
        raise
    except OSError as error:
        tmp.unlink(missing_ok=True)
        raise _write_error(target, error) from error
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return target


def _write_error(target: Path, error: OSError) -> ExportError:
    msg = f"cannot write `{target}`: {error.strerror or error}; check the folder and free space"
    return ExportError(msg)


def _write_parquet(
    tmp: Path,
    chunks: Iterator[pl.DataFrame],
    n_rows: int,
    row_group_rows: int,
    on_progress: Callable[[int, int], None] | None,
) -> None:
    done = 0
    with pq.ParquetWriter(tmp, _ARROW_SCHEMA, compression="zstd") as writer:
        for chunk in chunks:
            table = chunk.to_arrow().cast(_ARROW_SCHEMA)
            writer.write_table(table, row_group_size=row_group_rows)
            done += chunk.height
            if on_progress is not None:
                on_progress(done, n_rows)


def _write_csv(
    tmp: Path,
    chunks: Iterator[pl.DataFrame],
    n_rows: int,
    on_progress: Callable[[int, int], None] | None,
) -> None:
    done = 0
    with tmp.open("wb") as handle:
        for chunk in chunks:
            chunk.write_csv(handle, include_header=done == 0)
            done += chunk.height
            if on_progress is not None:
                on_progress(done, n_rows)
