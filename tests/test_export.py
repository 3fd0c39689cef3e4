"""Tests of triage.data.export; polars reading the written file back is the oracle."""

from __future__ import annotations

import errno
import os
from pathlib import Path

import numpy as np
import polars as pl
import pyarrow.parquet as pq
import pytest
from polars.testing import assert_frame_equal

from triage.data.export import PERSONAL_DATA_NOTICE, StreamingExport, write_frame
from triage.errors import ExportError


def _frame(n: int, start: int = 0) -> pl.DataFrame:
    rng = np.random.default_rng(start)
    return pl.DataFrame(
        {
            "__row": np.arange(start, start + n, dtype=np.int64),
            "resid": rng.normal(size=n),
            "name": pl.Series([f'row, {i} "q"' for i in range(start, start + n)], dtype=pl.String),
        }
    )


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith("."))


@pytest.mark.parametrize("name", ["out.parquet", "out.pq", "out.csv", "out.tsv"])
def test_export_write_frame_round_trip(tmp_path: Path, name: str) -> None:
    frame = _frame(50)
    path = write_frame(frame, tmp_path / name)
    assert path == tmp_path / name
    if name.endswith(("parquet", "pq")):
        back = pl.read_parquet(path)
    else:
        back = pl.read_csv(path, separator="\t" if name.endswith("tsv") else ",")
    assert_frame_equal(back, frame)
    assert _leftovers(tmp_path) == []


def test_export_refuses_overwrite_without_force(tmp_path: Path) -> None:
    path = tmp_path / "out.csv"
    path.write_text("keep me\n")
    with pytest.raises(ExportError, match=r"`out.csv` exists; pass `--force` to replace it"):
        write_frame(_frame(3), path)
    assert path.read_text() == "keep me\n"
    write_frame(_frame(3), path, force=True)
    assert_frame_equal(pl.read_csv(path), _frame(3))


def test_export_refuses_protected_paths_even_with_force(tmp_path: Path) -> None:
    source = tmp_path / "input.parquet"
    _frame(5).write_parquet(source)
    before = source.read_bytes()
    for target in (source, tmp_path / "." / "input.parquet"):
        with pytest.raises(ExportError, match="input"):
            write_frame(_frame(2), target, force=True, protected=[source])
    assert source.read_bytes() == before
    folder = tmp_path / "dataset"
    folder.mkdir()
    with pytest.raises(ExportError, match="lies inside"):
        write_frame(_frame(2), folder / "extra.parquet", protected=[folder])
    assert list(folder.iterdir()) == []
    # an input read by a file:// URL is its local file; other URLs name no local file
    guard = [source.as_uri(), "https://example.org/input.parquet"]
    with pytest.raises(ExportError, match="input"):
        write_frame(_frame(2), source, force=True, protected=guard)
    assert source.read_bytes() == before
    write_frame(_frame(2), tmp_path / "other.parquet", protected=guard)
    assert pl.read_parquet(tmp_path / "other.parquet").height == 2


def test_export_bad_targets(tmp_path: Path) -> None:
    with pytest.raises(ExportError, match="does not exist"):
        write_frame(_frame(2), tmp_path / "nope" / "out.csv")
    with pytest.raises(ExportError, match=r"export format of `out.xlsx`"):
        write_frame(_frame(2), tmp_path / "out.xlsx")
    with pytest.raises(ExportError, match=r"cannot write to `out.csv`"):
        write_frame(pl.DataFrame({"nested": [[1, 2]]}), tmp_path / "out.csv")
    assert not (tmp_path / "out.csv").exists()
    assert _leftovers(tmp_path) == []


@pytest.mark.skipif(hasattr(os, "geteuid") and os.geteuid() == 0, reason="running as root")
def test_export_unwritable_folder(tmp_path: Path) -> None:
    folder = tmp_path / "locked"
    folder.mkdir()
    folder.chmod(0o500)
    try:
        with pytest.raises(ExportError, match="cannot write in folder"):
            write_frame(_frame(2), folder / "out.parquet")
    finally:
        folder.chmod(0o700)


@pytest.mark.parametrize("name", ["many.parquet", "many.csv"])
def test_export_streams_many_batches_atomically(tmp_path: Path, name: str) -> None:
    path = tmp_path / name
    batches = [_frame(n, start=i * 1_000) for i, n in enumerate([40, 0, 25, 60, 1])]
    with StreamingExport(path) as export:
        for batch in batches:
            export.write(batch)
            assert not path.exists()  # nothing at the target until the block ends
    assert export.rows_written == 126
    back = pl.read_parquet(path) if name.endswith("parquet") else pl.read_csv(path)
    assert_frame_equal(back, pl.concat(batches))
    assert _leftovers(tmp_path) == []


@pytest.mark.parametrize("name", ["gone.parquet", "gone.csv"])
def test_export_error_removes_temporary_and_keeps_old_file(tmp_path: Path, name: str) -> None:
    path = tmp_path / name
    path.write_bytes(b"old contents")
    with pytest.raises(KeyboardInterrupt), StreamingExport(path, force=True) as export:
        export.write(_frame(10))
        raise KeyboardInterrupt  # a cancelled pass
    assert path.read_bytes() == b"old contents"
    assert _leftovers(tmp_path) == []


def test_export_write_failing_on_its_thread_is_one_error_and_no_file(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    path = tmp_path / "full.parquet"
    path.write_bytes(b"old contents")

    def disk_full(*_: object, **__: object) -> None:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(pq.ParquetWriter, "write_table", disk_full)
    with (
        pytest.raises(ExportError, match=r"cannot write to `full.parquet`.*free space"),
        StreamingExport(path, force=True) as export,
    ):
        for start in range(0, 50, 10):  # written on a thread: the error may come at a later call
            export.write(_frame(10, start=start))
    assert path.read_bytes() == b"old contents"
    assert _leftovers(tmp_path) == []


def test_export_takes_arrow_tables_and_keeps_statistics_asked_for(tmp_path: Path) -> None:
    path = tmp_path / "arrow.parquet"
    batches = [_frame(n, start=i * 100) for i, n in enumerate([30, 5, 40])]
    with StreamingExport(path, statistics=["__row"]) as export:
        for batch in batches:
            export.write(batch.to_arrow())
    assert_frame_equal(pl.read_parquet(path), pl.concat(batches))
    group = pq.read_metadata(path).row_group(0)
    with_statistics = [
        group.column(k).path_in_schema
        for k in range(group.num_columns)
        if group.column(k).is_stats_set
    ]
    assert with_statistics == ["__row"]


def test_export_rejects_batches_of_another_shape(tmp_path: Path) -> None:
    path = tmp_path / "shape.parquet"
    with (
        pytest.raises(ExportError, match="write batches of one shape"),
        StreamingExport(path) as export,
    ):
        export.write(_frame(3))
        export.write(_frame(3).drop("name"))
    assert not path.exists()
    assert _leftovers(tmp_path) == []


def test_export_nothing_written(tmp_path: Path) -> None:
    path = tmp_path / "empty.csv"
    with pytest.raises(ExportError, match="nothing was written"), StreamingExport(path):
        pass
    assert not path.exists()
    assert _leftovers(tmp_path) == []


def test_export_file_appearing_during_write_is_not_replaced(tmp_path: Path) -> None:
    path = tmp_path / "race.csv"
    with pytest.raises(ExportError, match="exists"), StreamingExport(path) as export:
        export.write(_frame(2))
        path.write_text("written by someone else\n")
    assert path.read_text() == "written by someone else\n"
    assert _leftovers(tmp_path) == []


def test_export_write_outside_block(tmp_path: Path) -> None:
    export = StreamingExport(tmp_path / "x.csv")
    with pytest.raises(ExportError, match="outside its `with` block"):
        export.write(_frame(1))


def test_export_personal_data_notice_is_one_line() -> None:
    assert "\n" not in PERSONAL_DATA_NOTICE
    assert "personal" in PERSONAL_DATA_NOTICE and "no proof" in PERSONAL_DATA_NOTICE


@pytest.mark.parametrize("name", ["out.parquet", "out.csv"])
def test_export_note_goes_to_metadata_or_a_sidecar(tmp_path: Path, name: str) -> None:
    import pyarrow.parquet as pq

    from triage.data.export import NOTE_KEY, NOTE_SUFFIX

    note = "fit #3: minutes ~ distance_km | where hour > 8 | a SAMPLE of 2,000 rows"
    path = write_frame(_frame(4), tmp_path / name, note=note)
    if name.endswith("parquet"):  # oracle: pyarrow's own reading of the footer
        assert pq.read_schema(path).metadata[NOTE_KEY.encode()].decode() == note
        assert not (tmp_path / (name + NOTE_SUFFIX)).exists()
        assert_frame_equal(pl.read_parquet(path), _frame(4))
    else:
        assert (tmp_path / (name + NOTE_SUFFIX)).read_text(encoding="utf-8") == note + "\n"
        assert_frame_equal(pl.read_csv(path), _frame(4))
        (tmp_path / ("other.csv" + NOTE_SUFFIX)).write_text("keep me\n", encoding="utf-8")
        with pytest.raises(
            ExportError, match=r"note `other\.csv\.fit\.txt` beside the export exists"
        ):
            write_frame(_frame(4), tmp_path / "other.csv", note=note)
        assert not (tmp_path / "other.csv").exists()
    assert _leftovers(tmp_path) == []


def test_cli_exports_name_the_fit_that_scored_their_rows(tmp_path: Path) -> None:
    # A file handed on says which model, filter and basis scored its rows: in the Parquet
    # metadata, or in a note beside a CSV (as the app's exports do).
    import pyarrow.parquet as pq

    from triage.cli.main import main
    from triage.data.export import NOTE_KEY, NOTE_SUFFIX

    demo = Path(__file__).resolve().parents[1] / "sample_parquet" / "deliveries.parquet"
    model = ["-y", "minutes", "-x", "distance_km, depot", "--where", "minutes < 1000"]
    every = tmp_path / "every.parquet"
    assert main(["export", str(demo), *model, "--all", "--out", str(every)]) == 0
    note = pq.read_schema(every).metadata[NOTE_KEY.encode()].decode()
    assert note == (
        "scored by minutes ~ distance_km + depot | where minutes < 1000 | fitted on every row"
    )
    worst = tmp_path / "worst.csv"
    command = ["export", str(demo), *model, "--worst", "5", "--rows", "20000"]
    assert main([*command, "--out", str(worst)]) == 0
    sidecar = worst.with_name(worst.name + NOTE_SUFFIX)
    assert sidecar.read_text().splitlines() == [
        "scored by minutes ~ distance_km + depot | where minutes < 1000"
        " | fitted on a sample of about 20,000 rows"
    ]
