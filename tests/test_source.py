"""Tests of triage.data.source: every kind of source against polars/pyarrow reading the same file.

The oracle throughout is polars (`pl.read_parquet`, `pl.read_csv`, `pl.read_ipc`) reading the
file written in the test, with `with_row_index` for the positions; scipy checks uniformity.
"""

from __future__ import annotations

import gzip
from pathlib import Path

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.ipc as ipc
import pyarrow.parquet as pq
import pytest
from polars.testing import assert_frame_equal
from scipy import stats

from triage.data import ipc as ipc_module
from triage.data import parquet as parquet_module
from triage.data.source import ROW_INDEX, CsvOptions, Sample, Source, open_source
from triage.errors import SourceError, SpecError


def _frame(n: int, seed: int = 0) -> pl.DataFrame:
    rng = np.random.default_rng(seed)
    return pl.DataFrame(
        {
            "x": rng.normal(size=n),
            "k": np.arange(n, dtype=np.int64),
            "depot": rng.choice(["north", "south", "east"], size=n),
            "w": pl.Series(rng.uniform(size=n)).set(pl.Series(rng.uniform(size=n) < 0.1), None),
        }
    )


def _indexed(frame: pl.DataFrame) -> pl.DataFrame:
    # The oracle's positions: polars' row index, as int64.
    return frame.with_row_index(ROW_INDEX).with_columns(pl.col(ROW_INDEX).cast(pl.Int64))


def _scan_all(source: Source, columns: list[str], **kwargs: object) -> pl.DataFrame:
    batches = source.scan_batches(columns, **kwargs)  # type: ignore[arg-type]
    return pl.concat([batch.frame for batch in batches])


@pytest.fixture
def parquet_file(tmp_path: Path) -> Path:
    path = tmp_path / "deliveries.parquet"
    pq.write_table(_frame(1_000).to_arrow(), path, row_group_size=128)  # 8 row groups
    return path


@pytest.fixture
def hive_folder(tmp_path: Path) -> Path:
    root = tmp_path / "by_year"
    frame = _frame(600, seed=1).with_columns(
        year=pl.Series(np.repeat([2022, 2023, 2024], 200)),
    )
    for (year,), part in frame.partition_by("year", as_dict=True).items():
        folder = root / f"year={year}"
        folder.mkdir(parents=True)
        pq.write_table(
            part.drop("year").head(120).to_arrow(), folder / "a.parquet", row_group_size=50
        )
        pq.write_table(
            part.drop("year").tail(80).to_arrow(), folder / "b.parquet", row_group_size=50
        )
    (root / "_SUCCESS").write_text("")
    return root


@pytest.fixture
def ipc_file(tmp_path: Path) -> Path:
    path = tmp_path / "deliveries.arrow"
    table = _frame(500, seed=2).to_arrow()
    with pa.OSFile(str(path), "wb") as sink, ipc.new_file(sink, table.schema) as writer:
        for batch in table.to_batches(max_chunksize=70):
            writer.write_batch(batch)
    return path


_CSV_TEXT = (
    "id;name;amount;note\n"
    '0;"Smith; J";1.5;"said ""hi"""\n'
    "1;Lee;NA;\n"
    "2;Ng;3.25;null\n"
    '3;"O\'Brien";-4;"two\nlines"\n'
    "4;Roe;NaN;x\n"
)


def test_source_parquet_file_schema_count_and_batches(parquet_file: Path) -> None:
    source = open_source(parquet_file)
    oracle = pl.read_parquet(parquet_file)  # polars as oracle
    assert source.schema() == dict(oracle.schema)
    assert source.row_count() == oracle.height == source.count_rows_exact()
    assert source.n_blocks == pq.ParquetFile(parquet_file).metadata.num_row_groups == 8
    assert "8 row groups" in source.description
    got = _scan_all(source, ["x", "depot", "w"], batch_rows=100)
    assert_frame_equal(got, _indexed(oracle).select(ROW_INDEX, "x", "depot", "w"))


def test_source_batches_are_bounded_and_progress_increases(parquet_file: Path) -> None:
    source = open_source(parquet_file)
    batches = list(source.scan_batches(["x"], batch_rows=50))
    assert all(b.frame.height <= 50 for b in batches)
    progress = [b.rows_read for b in batches]
    assert progress == sorted(progress)
    assert progress[-1] == 1_000


def test_source_hive_folder_positions_run_across_sorted_files(hive_folder: Path) -> None:
    source = open_source(hive_folder)
    files = sorted(hive_folder.rglob("*.parquet"), key=lambda p: p.as_posix())
    assert list(source.files) == files
    oracle = _hive_oracle(hive_folder)
    assert source.schema() == dict(oracle.schema)
    assert source.row_count() == 600
    assert "partitioned by year" in source.description
    got = _scan_all(source, ["k", "year", "w"], batch_rows=64)
    assert_frame_equal(got, _indexed(oracle).select(ROW_INDEX, "k", "year", "w"))


def test_source_glob_of_parquet_files(tmp_path: Path) -> None:
    frame = _frame(90, seed=3)
    for i in range(3):
        frame.slice(30 * i, 30).write_parquet(tmp_path / f"part_{i}.parquet")
    (tmp_path / "notes.md").write_text("not data")
    source = open_source(tmp_path / "part_*.parquet")
    assert len(source.files) == 3
    assert source.row_count() == 90
    oracle = pl.read_parquet(tmp_path / "part_*.parquet")  # polars expands the same glob
    assert_frame_equal(_scan_all(source, ["x", "k"]), _indexed(oracle).select(ROW_INDEX, "x", "k"))


def test_source_partition_names_above_the_folder_are_not_columns(tmp_path: Path) -> None:
    root = tmp_path / "env=test" / "data"
    for region in ("a", "b"):
        folder = root / f"region={region}"
        folder.mkdir(parents=True)
        pl.DataFrame({"y": [1.0, 2.0]}).write_parquet(folder / "p.parquet")
    for path in (root, root / "*" / "*.parquet"):
        source = open_source(path)
        assert list(source.schema()) == ["y", "region"]
        assert _scan_all(source, ["region"])["region"].to_list() == ["a", "a", "b", "b"]


def test_source_csv_quotes_nulls_and_separator(tmp_path: Path) -> None:
    path = tmp_path / "people.csv"
    path.write_text(_CSV_TEXT)
    options = CsvOptions(separator=";")
    source = open_source(path, csv=options)
    oracle = pl.read_csv(path, separator=";", null_values=["", "NA", "NaN", "null"])
    assert source.schema() == dict(oracle.schema)
    assert source.row_count() is None
    assert source.count_rows_exact() == 5
    got = _scan_all(source, ["id", "name", "amount", "note"], batch_rows=2)
    assert_frame_equal(got, _indexed(oracle))
    assert got["name"][0] == "Smith; J"
    assert got["note"][0] == 'said "hi"'
    assert got["amount"].null_count() == 2  # `NA` and `NaN` read as missing
    assert got["note"][3] == "two\nlines"


def test_source_tsv_and_gzip_csv(tmp_path: Path) -> None:
    frame = _frame(40, seed=4)
    tsv = tmp_path / "t.tsv"
    frame.write_csv(tsv, separator="\t")
    gz = tmp_path / "t.csv.gz"
    with gzip.open(gz, "wb") as handle:
        frame.write_csv(handle)
    for path, sep in ((tsv, "\t"), (gz, ",")):
        oracle = pl.read_csv(path, separator=sep, null_values=["", "NA", "NaN", "null"])
        got = _scan_all(open_source(path), list(oracle.columns))
        assert_frame_equal(got, _indexed(oracle))


def test_source_ipc_record_batches(ipc_file: Path) -> None:
    source = open_source(ipc_file)
    oracle = pl.read_ipc(ipc_file)  # polars as oracle
    assert source.schema() == dict(oracle.schema)
    assert source.row_count() == 500
    assert source.n_blocks == 8  # ceil(500 / 70) record batches written above
    assert_frame_equal(
        _scan_all(source, ["k", "depot"], batch_rows=32),
        _indexed(oracle).select(ROW_INDEX, "k", "depot"),
    )


@pytest.mark.parametrize("compression", [None, "zstd", "lz4"])
def test_source_ipc_rows_per_batch_from_headers_equal_pyarrows(
    tmp_path: Path, compression: str | None
) -> None:
    # pyarrow's reader, which reads each batch whole, is the oracle for the rows the footer
    # and message headers give; a zero-row batch, a dictionary column and compressed bodies
    # must not confuse the walk over the flatbuffers.
    table = _frame(500, seed=6).with_columns(pl.col("depot").cast(pl.Categorical)).to_arrow()
    path = tmp_path / "f.arrow"
    options = ipc.IpcWriteOptions(compression=compression)
    with pa.OSFile(str(path), "wb") as sink, ipc.new_file(sink, table.schema, options=options) as w:
        w.write_batch(table.to_batches()[0].slice(0, 0))
        w.write_table(table, max_chunksize=70)
    reader = ipc.open_file(str(path))
    oracle = [reader.get_batch(i).num_rows for i in range(reader.num_record_batches)]
    with pa.OSFile(str(path)) as file:
        assert ipc_module.record_batch_rows(file) == oracle == [0, *[70] * 7, 10]
    with pa.OSFile(str(tmp_path / "f.arrow"), "wb") as sink, ipc.new_file(sink, table.schema):
        pass  # no record batch at all
    with pa.OSFile(str(path)) as file:
        assert ipc_module.record_batch_rows(file) == []
    path.write_bytes(b"not arrow")
    with pa.OSFile(str(path)) as file, pytest.raises(ValueError, match="not an Arrow IPC"):
        ipc_module.record_batch_rows(file)


@pytest.mark.parametrize("kind", ["parquet", "hive", "ipc", "csv"])
def test_source_filter_keeps_source_positions(
    kind: str, parquet_file: Path, hive_folder: Path, ipc_file: Path, tmp_path: Path
) -> None:
    if kind == "csv":
        path = tmp_path / "f.csv"
        _frame(300, seed=5).write_csv(path)
    else:
        path = {"parquet": parquet_file, "hive": hive_folder, "ipc": ipc_file}[kind]
    source = open_source(path)
    where = (pl.col("x") > 0.5) & pl.col("w").is_not_null()
    every = _scan_all(source, ["x", "w", "k"])
    batches = list(source.scan_batches(["x", "w", "k"], where=where, batch_rows=40))
    got = pl.concat([b.frame for b in batches])
    assert batches[-1].rows_read == every.height  # progress counts rows before the filter
    assert_frame_equal(got, every.filter(where))
    assert 0 < got.height < every.height
    # positions are still positions in the file: read_rows gives the same rows back
    assert_frame_equal(source.read_rows(got[ROW_INDEX]).select(got.columns), got)


@pytest.mark.parametrize("part_rows", [1, 300, 10_000])
def test_source_parts_together_equal_one_scan(
    parquet_file: Path, monkeypatch: pytest.MonkeyPatch, part_rows: int
) -> None:
    # polars' own read, filtered, is the oracle; parts are whole row groups of 128 rows.
    monkeypatch.setattr(parquet_module, "PART_ROWS", part_rows)
    source = open_source(parquet_file)
    where = (pl.col("x") > 0.0) & pl.col("w").is_not_null()
    parts = source.scan_parts(["x", "k"], where=where, batch_rows=50)
    assert len(parts) == {1: 8, 300: 3, 10_000: 1}[part_rows]
    frames, read = [], 0
    for part in parts:
        batches = list(part())
        assert all(b.frame.height <= 50 for b in batches)
        read += batches[-1].rows_read  # counted within the part
        frames.extend(b.frame for b in batches)
    oracle = _indexed(pl.read_parquet(parquet_file)).filter(where).select(ROW_INDEX, "x", "k")
    assert read == 1_000
    assert_frame_equal(pl.concat(frames), oracle)


@pytest.mark.parametrize("part_rows", [1, 10_000])
def test_source_folder_parts_keep_positions_and_partition_columns(
    tmp_path: Path, part_rows: int
) -> None:
    # Oracle: polars scanning the folder itself (hive columns from the folder names, rows
    # numbered across files in sorted order). Parts are per file, never across files.
    root = tmp_path / "by_region"
    frame = _frame(600, seed=4).with_columns(
        region=pl.Series(np.repeat(["north east", "south", "west"], 200)),
        year=pl.Series(np.tile(np.repeat([2023, 2024], 100), 3)),
    )
    for (region, year), part in frame.partition_by("region", "year", as_dict=True).items():
        folder = root / f"region={region.replace(' ', '%20')}" / f"year={year}"
        folder.mkdir(parents=True)
        table = part.drop("region", "year").to_arrow()
        pq.write_table(table, folder / "a.parquet", row_group_size=40)
    source = open_source(root)
    where = pl.col("x") > 0.0
    parts = source.scan_parts(
        ["year", "x", "region"], where=where, batch_rows=30, part_rows=part_rows
    )
    assert len(parts) == {1: 18, 10_000: 6}[part_rows]  # 6 files of 3 row groups (40, 40, 20)
    oracle = _indexed(pl.scan_parquet(root, hive_partitioning=True).collect())
    oracle = oracle.filter(where).select(ROW_INDEX, "year", "x", "region")
    got = pl.concat(b.frame for part in parts for b in part())
    assert_frame_equal(got, oracle)
    assert got["region"].unique().sort().to_list() == ["north east", "south", "west"]


def test_source_url_folder_and_glob_equal_the_folder_on_disk(tmp_path: Path) -> None:
    # Oracle: polars reading the folder itself (its own typing of the partition values,
    # here text, integers with a missing value, floats and dates), against the same folder
    # named by file:// URLs and read through fsspec and pyarrow.
    root = tmp_path / "by_region"
    frame = _frame(600, seed=8)
    folders = [
        ("region=north east", "year=2023", "rate=0.5", "day=2024-01-01"),
        ("region=south", "year=__HIVE_DEFAULT_PARTITION__", "rate=1", "day=2024-02-01"),
        ("region=west", "year=2024", "rate=2.25", "day=2024-03-01"),
    ]
    for k, names in enumerate(folders):
        folder = root.joinpath(*names)
        folder.mkdir(parents=True)
        pq.write_table(
            frame.slice(200 * k, 200).to_arrow(), folder / "a.parquet", row_group_size=64
        )
    (root / "_SUCCESS").write_text("")
    on_disk = open_source(root)
    every = _scan_all(on_disk, list(on_disk.schema()))
    assert every.schema["year"] == pl.Int64 and every.schema["day"] == pl.Date
    assert every["year"].null_count() == 200
    for url in (root.as_uri(), f"{root.as_uri()}/*/*/*/*/*.parquet"):
        source = open_source(url)
        assert source.schema() == on_disk.schema()
        assert_frame_equal(_scan_all(source, list(source.schema()), batch_rows=50), every)
        assert_frame_equal(
            source.read_rows([599, 0, 200, 64]), on_disk.read_rows([599, 0, 200, 64])
        )
        parts = source.scan_parts(["x", "year"], where=pl.col("x") > 0, part_rows=1)
        assert len(parts) == 12  # 3 files of 4 row groups
        got = pl.concat(b.frame for part in parts for b in part())
        assert_frame_equal(got, every.filter(pl.col("x") > 0).select(ROW_INDEX, "x", "year"))


def test_source_parts_pickle_without_the_source(parquet_file: Path) -> None:
    # A part crosses to a cluster worker: it must pickle small and read the same rows there.
    import pickle

    parts = open_source(parquet_file).scan_parts(["x"], batch_rows=50, part_rows=300)
    blobs = [pickle.dumps(part) for part in parts]
    assert max(len(b) for b in blobs) < 2_000
    again = [pickle.loads(b) for b in blobs]
    assert_frame_equal(
        pl.concat(b.frame for part in again for b in part()),
        pl.concat(b.frame for part in parts for b in part()),
    )


def test_source_parts_split_row_groups_into_equal_batches(
    parquet_file: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # Hand-worked: 128 rows in batches of at most 50 are 3 batches of 43, 43 and 42 rows.
    monkeypatch.setattr(parquet_module, "PART_ROWS", 1)
    assert parquet_module.even_batch_rows(128, 50) == 43
    assert parquet_module.even_batch_rows(1_000_000, 262_144) == 250_000
    assert parquet_module.even_batch_rows(5, 262_144) == 5
    part = open_source(parquet_file).scan_parts(["x"], batch_rows=50)[0]
    assert [b.frame.height for b in part()][:3] == [43, 43, 42]


def test_source_streams_are_one_part(ipc_file: Path, tmp_path: Path) -> None:
    path = tmp_path / "f.csv"
    _frame(300, seed=5).write_csv(path)
    for source in (open_source(path), open_source(ipc_file)):
        (part,) = source.scan_parts(["x"], batch_rows=64)
        assert_frame_equal(pl.concat(b.frame for b in part()), _scan_all(source, ["x"]))


def test_source_column_projection_and_unknown_column(parquet_file: Path) -> None:
    source = open_source(parquet_file)
    first = next(iter(source.scan_batches(["w"]))).frame
    assert first.columns == [ROW_INDEX, "w"]
    assert first.schema[ROW_INDEX] == pl.Int64
    only_rows = _scan_all(source, [])
    assert only_rows.columns == [ROW_INDEX] and only_rows.height == 1_000
    with pytest.raises(SpecError, match=r"unknown column `depto`.*`depot`"):
        list(source.scan_batches(["depto"]))


@pytest.mark.parametrize("bad", [0, -3, 2.5, True])
def test_source_rejects_bad_batch_and_sample_sizes(parquet_file: Path, bad: object) -> None:
    # Common practice (scikit-learn's parameter checks): a bool is not a count.
    source = open_source(parquet_file)
    with pytest.raises(SpecError, match=rf"`batch_rows` must be a positive integer, got `{bad!r}`"):
        list(source.scan_batches(["w"], batch_rows=bad))  # type: ignore[arg-type]
    with pytest.raises(SpecError, match=rf"`n_rows` must be a positive integer, got `{bad!r}`"):
        source.read_sample(["w"], n_rows=bad, seed=0)  # type: ignore[arg-type]


def _assert_same_sample(a: Sample, b: Sample) -> None:
    assert_frame_equal(a.frame, b.frame)
    assert (a.description, a.is_whole, a.warning) == (b.description, b.is_whole, b.warning)


def _assert_sample_rows_match(source: Source, sample_frame: pl.DataFrame) -> None:
    positions = sample_frame[ROW_INDEX]
    assert positions.is_unique().all() and positions.is_sorted()
    assert_frame_equal(source.read_rows(positions).select(sample_frame.columns), sample_frame)


@pytest.mark.parametrize("kind", ["parquet", "ipc", "hive"])
def test_source_group_sample_is_whole_blocks_and_deterministic(
    kind: str, parquet_file: Path, hive_folder: Path, ipc_file: Path
) -> None:
    path = {"parquet": parquet_file, "hive": hive_folder, "ipc": ipc_file}[kind]
    source = open_source(path)
    sample = source.read_sample(["x", "k"], n_rows=150, seed=7)
    _assert_same_sample(sample, source.read_sample(["x", "k"], n_rows=150, seed=7))
    assert sample.frame.height >= 150
    assert not sample.is_whole and sample.warning is not None
    assert "seed 7" in sample.description
    _assert_sample_rows_match(source, sample.frame)
    full = _scan_all(source, ["x", "k"])
    assert sample.frame.height < full.height
    seeds = {
        tuple(source.read_sample(["k"], n_rows=150, seed=s).frame[ROW_INDEX]) for s in range(6)
    }
    assert len(seeds) > 1


@pytest.mark.parametrize("kind", ["parquet", "ipc", "hive", "csv"])
@pytest.mark.parametrize("where", [None, "x > -0.5"])
def test_source_group_sample_spread_to_keeps_the_rows_spread_through_the_blocks(
    kind: str,
    where: str | None,
    parquet_file: Path,
    hive_folder: Path,
    ipc_file: Path,
    tmp_path: Path,
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    """`spread_to` keeps rows k * H // n of the H rows the blocks hold (after the filter).

    A Parquet file thins its row groups batch by batch (several batches a group here),
    reading text dictionary-encoded; every source must give the rows of the whole sample.
    """
    monkeypatch.setattr(parquet_module, "SAMPLE_BATCH_ROWS", 50)
    csv_path = tmp_path / "big.csv"
    _frame(2_000, seed=8).write_csv(csv_path)
    path = {"parquet": parquet_file, "hive": hive_folder, "ipc": ipc_file, "csv": csv_path}[kind]
    source = open_source(path)
    columns = ["x", "depot", "w"]
    expr = None if where is None else pl.sql_expr(where)
    whole = source.read_sample(columns, n_rows=150, seed=7, where=expr)
    spread = source.read_sample(columns, n_rows=150, seed=7, where=expr, spread_to=60)
    assert not whole.is_whole and whole.frame.height > 60
    keep = np.arange(60) * whole.frame.height // 60  # the rule, written out
    assert_frame_equal(spread.frame, whole.frame[keep])
    assert (spread.description, spread.rows_read) == (whole.description, whole.rows_read)
    small = source.read_sample(columns, n_rows=10_000, seed=7, spread_to=60)
    assert small.is_whole and small.frame.height > 60  # the whole source is kept whole


def test_source_group_sample_parquet_matches_row_groups(parquet_file: Path) -> None:
    source = open_source(parquet_file)
    sample = source.read_sample(["k"], n_rows=300, seed=1)
    # 128-row groups: 300 rows need 3 groups; each group is a full run of 128 positions
    starts = np.unique(sample.frame[ROW_INDEX].to_numpy() // 128)
    assert starts.size == 3 and sample.frame.height == 3 * 128 == sample.rows_read
    assert "3 of 8 row groups" in sample.description


def test_source_csv_block_sample(tmp_path: Path) -> None:
    path = tmp_path / "big.csv"
    _frame(2_000, seed=8).write_csv(path)
    source = open_source(path)
    sample = source.read_sample(["x", "k"], n_rows=400, seed=3)
    _assert_same_sample(sample, source.read_sample(["x", "k"], n_rows=400, seed=3))
    assert 400 <= sample.frame.height < 2_000
    assert "blocks of 50 consecutive rows" in sample.description
    _assert_sample_rows_match(source, sample.frame)


@pytest.mark.parametrize("kind", ["parquet", "csv"])
def test_source_uniform_sample(kind: str, parquet_file: Path, tmp_path: Path) -> None:
    if kind == "csv":
        path = tmp_path / "u.csv"
        _frame(1_000).write_csv(path)
    else:
        path = parquet_file
    source = open_source(path)
    sample = source.read_sample(["x", "k"], n_rows=300, seed=11, sampling="uniform")
    assert sample.frame.height == 300
    _assert_same_sample(
        sample, source.read_sample(["x", "k"], n_rows=300, seed=11, sampling="uniform")
    )
    assert not sample.is_whole and sample.warning is None
    assert "uniformly" in sample.description
    _assert_sample_rows_match(source, sample.frame)
    other = source.read_sample(["x", "k"], n_rows=300, seed=12, sampling="uniform")
    assert not other.frame[ROW_INDEX].equals(sample.frame[ROW_INDEX])
    # same rows whatever the batching: the choice depends on positions and seed only
    assert sample.frame[ROW_INDEX].to_list() == sorted(sample.frame[ROW_INDEX].to_list())


def test_source_uniform_sample_is_uniform(tmp_path: Path) -> None:
    path = tmp_path / "many.parquet"
    pq.write_table(pl.DataFrame({"k": np.arange(20_000)}).to_arrow(), path, row_group_size=1_000)
    positions = (
        open_source(path)
        .read_sample(["k"], n_rows=2_000, seed=0, sampling="uniform")
        .frame[ROW_INDEX]
    )
    # scipy's one-sample Kolmogorov-Smirnov test against U(0, 20000): a uniform sample passes;
    # a sample of whole row groups or a prefix would fail badly
    result = stats.kstest(positions.to_numpy() + 0.5, stats.uniform(loc=0, scale=20_000).cdf)
    assert result.pvalue > 1e-3


def test_source_uniform_sample_with_filter_draws_from_passing_rows(parquet_file: Path) -> None:
    source = open_source(parquet_file)
    where = pl.col("depot") == "north"
    sample = source.read_sample(["depot"], n_rows=100, seed=0, sampling="uniform", where=where)
    assert sample.frame.height == 100
    assert sample.rows_read == 1_000  # uniform sampling reads every row
    assert (sample.frame["depot"] == "north").all()
    assert "pass the filter" in sample.description


def test_source_filter_on_a_column_not_requested(parquet_file: Path) -> None:
    source = open_source(parquet_file)
    where = pl.col("depot") == "east"
    got = _scan_all(source, ["k"], where=where)
    assert got.columns == [ROW_INDEX, "k"]
    oracle = _indexed(pl.read_parquet(parquet_file)).filter(where)  # polars as oracle
    assert_frame_equal(got, oracle.select(ROW_INDEX, "k"))
    sample = source.read_sample(["k"], n_rows=200, seed=0, where=where)
    assert sample.frame.columns == [ROW_INDEX, "k"]
    assert set(sample.frame["k"]) <= set(oracle["k"])


def test_source_small_source_is_read_whole(parquet_file: Path, tmp_path: Path) -> None:
    source = open_source(parquet_file)
    for sampling in ("groups", "uniform"):
        sample = source.read_sample(["k"], n_rows=5_000, seed=0, sampling=sampling)  # type: ignore[arg-type]
        assert sample.is_whole and sample.warning is None
        assert sample.frame.height == 1_000
        assert sample.description.startswith("all 1,000 rows")
    path = tmp_path / "small.csv"
    _frame(30).write_csv(path)
    sample = open_source(path).read_sample(["k"], n_rows=30, seed=0)
    assert sample.is_whole and sample.frame.height == 30


def test_source_group_sample_with_filter(parquet_file: Path) -> None:
    source = open_source(parquet_file)
    where = pl.col("x") > 0
    sample = source.read_sample(["x"], n_rows=200, seed=2, where=where)
    assert (sample.frame["x"] > 0).all()
    assert "kept by the filter" in sample.description


def _hive_oracle(folder: Path) -> pl.DataFrame:
    # polars reading the sorted files with hive partitioning is the oracle
    files = sorted((str(f) for f in folder.rglob("*.parquet")), key=lambda f: Path(f).as_posix())
    frame = pl.read_parquet(files, hive_partitioning=True)
    return frame.select("x", "k", "depot", "w", "year")


def test_source_read_rows_order_across_groups_and_files(
    parquet_file: Path, hive_folder: Path, ipc_file: Path, tmp_path: Path
) -> None:
    csv_path = tmp_path / "r.csv"
    _frame(300, seed=9).write_csv(csv_path)
    cases = [
        (parquet_file, pl.read_parquet(parquet_file), [999, 0, 130, 129, 130]),
        (hive_folder, _hive_oracle(hive_folder), [599, 3, 121, 200]),
        (ipc_file, pl.read_ipc(ipc_file), [71, 70, 69, 499]),
        (csv_path, pl.read_csv(csv_path, null_values=["", "NA", "NaN", "null"]), [250, 1, 2]),
    ]
    for path, oracle, positions in cases:
        source = open_source(path)
        got = source.read_rows(positions)
        indexed = oracle if ROW_INDEX in oracle.columns else _indexed(oracle)
        expected = pl.DataFrame({ROW_INDEX: positions}, schema={ROW_INDEX: pl.Int64}).join(
            indexed, on=ROW_INDEX, how="left", maintain_order="left"
        )
        assert_frame_equal(got, expected.select(got.columns))
        assert got.columns == [ROW_INDEX, *source.schema()]


@pytest.mark.parametrize("bad", [-1, 1_000])
def test_source_read_rows_out_of_range(parquet_file: Path, tmp_path: Path, bad: int) -> None:
    with pytest.raises(SourceError, match=r"outside .* 1,000 rows"):
        open_source(parquet_file).read_rows([3, bad])
    path = tmp_path / "r.csv"
    _frame(1_000).write_csv(path)
    with pytest.raises(SourceError, match=r"outside .* 1,000 rows"):
        open_source(path).read_rows([bad])


def test_source_csv_folder_and_glob_read_as_one_table(tmp_path: Path) -> None:
    # Oracle: polars reading the files one after another and stacking them. The last file
    # has no value but integers in `x`: it is read with the first file's types (float).
    frame = _frame(1_000, seed=7)
    folder = tmp_path / "csv"
    folder.mkdir()
    sizes = [300, 450, 250]
    for k, start in enumerate([0, 300, 750]):
        part = frame.slice(start, sizes[k])
        if k == 2:
            part = part.with_columns(pl.col("x").round().cast(pl.Int64))
        part.write_csv(folder / f"part-{k}.csv")
    (folder / "_SUCCESS").write_text("")  # a writer's bookkeeping, skipped
    oracle = pl.concat(
        [pl.read_csv(folder / f"part-{k}.csv").cast({"x": pl.Float64}) for k in range(3)]
    )
    for source in (open_source(folder), open_source(folder / "*.csv")):
        assert source.schema() == dict(oracle.schema)
        assert source.count_rows_exact() == 1_000 and len(source.files) == 3
        every = _scan_all(source, list(oracle.columns), batch_rows=128)
        assert_frame_equal(every, _indexed(oracle))
        where = pl.col("x") > 0
        parts = source.scan_parts(["x", "k"], where=where, batch_rows=100)
        assert [part.start for part in parts] == [0, 300, 750]  # type: ignore[attr-defined]
        assert [part.rows for part in parts] == sizes  # type: ignore[attr-defined]
        got = pl.concat(b.frame for part in parts for b in part())
        assert_frame_equal(got, _indexed(oracle).filter(where).select(ROW_INDEX, "x", "k"))
        positions = [999, 0, 299, 300, 749, 750, 5]
        assert_frame_equal(source.read_rows(positions), _indexed(oracle)[positions])
    other = tmp_path / "other"
    other.mkdir()
    frame.head(5).write_csv(other / "a.csv")
    frame.head(5).select("k", "x").write_csv(other / "b.csv")
    with pytest.raises(SourceError, match="must share a header"):
        open_source(other)
    hive = tmp_path / "hive" / "year=2024"
    hive.mkdir(parents=True)
    frame.head(5).write_csv(hive / "a.csv")
    with pytest.raises(SourceError, match="read as a column only for Parquet"):
        open_source(tmp_path / "hive")


def test_source_bad_paths(tmp_path: Path) -> None:
    with pytest.raises(SourceError, match="does not exist"):
        open_source(tmp_path / "missing.parquet")
    (tmp_path / "empty").mkdir()
    with pytest.raises(SourceError, match="holds no Parquet files"):
        open_source(tmp_path / "empty")
    (tmp_path / "data.xlsx").write_bytes(b"PK")
    with pytest.raises(SourceError, match="cannot tell the format"):
        open_source(tmp_path / "data.xlsx")
    with pytest.raises(SourceError, match="matches no Parquet files"):
        open_source(tmp_path / "*.parquet")


def test_source_corrupt_files(tmp_path: Path, parquet_file: Path, ipc_file: Path) -> None:
    junk = tmp_path / "junk.parquet"
    junk.write_bytes(b"this is not parquet at all")
    truncated = tmp_path / "cut.parquet"
    truncated.write_bytes(parquet_file.read_bytes()[:-100])
    cut_ipc = tmp_path / "cut.arrow"
    cut_ipc.write_bytes(ipc_file.read_bytes()[: ipc_file.stat().st_size // 2])
    for path in (junk, truncated, cut_ipc):
        with pytest.raises(SourceError, match=f"cannot read `.*{path.name}`") as info:
            open_source(path)
        assert "\n" not in str(info.value)
    binary = tmp_path / "binary.csv"
    binary.write_bytes(b"a,b\n\xff\xfe,\x00\x81\n")
    with pytest.raises(SourceError, match="cannot read"):
        source = open_source(binary)
        list(source.scan_batches(["a", "b"]))


def test_source_refuses_a_column_named_like_row_index(tmp_path: Path) -> None:
    path = tmp_path / "clash.parquet"
    pl.DataFrame({ROW_INDEX: [1, 2], "y": [1.0, 2.0]}).write_parquet(path)
    with pytest.raises(SourceError, match="`__row`"):
        open_source(path)
