"""A catalogue of bad inputs and faults, each with its exact outcome (issue 14).

Every case runs a command as a user would and checks: the exit code; stderr holds no
traceback and, for an error, one line that names the file, column, term or option and gives
a hint (our messages put the hint after a `;`); no file appears anywhere; every input file
hashes the same before and after. Most cases run in-process (`triage.cli.main.main`); files
changed mid-pass use the in-process batch hook (`triage.data.hooks`), and signals a child
process paused at a known batch by `TRIAGE_TEST_PAUSE_AT_BATCH`: no sleeps anywhere.

The tables come from our own demo scenario (`triage.data.scenario`), with a few odd columns
added (text, a constant, values near the float limit, zeros under a log).
"""

from __future__ import annotations

import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import polars as pl
import pyarrow as pa
import pyarrow.ipc as ipc
import pytest

from triage.cli.main import main
from triage.data import hooks
from triage.data.scenario import write_scenario

ROOT = Path(__file__).resolve().parent.parent
MODEL = ["-y", "minutes", "-x", "distance_km, stops, depot"]


def _write_inputs(folder: Path) -> None:
    """Write every input the catalogue reads into `folder` (good, empty, damaged, odd)."""
    folder.mkdir(parents=True, exist_ok=True)
    good = folder / "deliveries.parquet"
    write_scenario(good, n_rows=6_000, seed=3, row_group_rows=1_000)
    frame = pl.read_parquet(good)
    rng = np.random.default_rng(14)
    odd = frame.with_columns(
        note=pl.Series([f"run {i}" for i in range(frame.height)]),
        flat=pl.lit(2.5),
        huge=pl.col("distance_km") * 1e300,
        zeros=pl.Series(
            np.where(rng.random(frame.height) < 0.1, 0.0, 1.0 + rng.random(frame.height))
        ),
        signed_w=pl.Series(rng.normal(size=frame.height)),
    )
    odd.write_parquet(folder / "odd.parquet", row_group_size=1_000)
    frame.write_csv(folder / "deliveries.csv")
    with pa.OSFile(str(folder / "deliveries.arrow"), "wb") as sink:
        table = frame.to_arrow()
        with ipc.new_file(sink, table.schema) as writer:
            writer.write_table(table, max_chunksize=1_000)
    parts = folder / "parts"
    parts.mkdir()
    for k in range(3):
        frame.slice(2_000 * k, 2_000).write_parquet(parts / f"part-{k}.parquet", row_group_size=500)
    for name in ("empty.parquet", "empty.csv", "empty.arrow"):
        (folder / name).write_bytes(b"")
    for name in ("deliveries.parquet", "deliveries.arrow", "deliveries.csv"):
        data = (folder / name).read_bytes()
        (folder / f"cut-{name}").write_bytes(data[: len(data) // 2])
    (folder / "noise.parquet").write_bytes(rng.bytes(4_096))
    (folder / "latin1.csv").write_bytes("minutes,depot\n1.5,k\xf6ln\n2.5,north\n".encode("latin-1"))
    (folder / "ragged.csv").write_text("minutes,stops\n1,2\n3\n4,5,6\n")
    (folder / "table.xlsx").write_bytes(b"PK\x03\x04")
    (folder / "hollow").mkdir()
    damaged = folder / "damaged"
    damaged.mkdir()
    shutil.copy(parts / "part-0.parquet", damaged / "part-0.parquet")
    (damaged / "part-1.parquet").write_bytes((parts / "part-1.parquet").read_bytes()[:300])
    mixed = folder / "mixed"
    mixed.mkdir()
    shutil.copy(parts / "part-0.parquet", mixed / "part-0.parquet")
    (mixed / "notes.txt").write_text("not a table\n")
    (folder / "exists.csv").write_text("a\n1\n")
    (folder / "header-only.csv").write_text("minutes,stops\n")
    pl.DataFrame(
        {"minutes": [None] * 20, "stops": list(range(20))},
        schema={"minutes": pl.Float64, "stops": pl.Int64},
    ).write_parquet(folder / "no-target.parquet")
    runs = "".join(f"{1.5 * i},{i}\n" for i in range(50))
    (folder / "stray-text.csv").write_text(f"minutes,stops\n{runs}n/a?,3\n")


@pytest.fixture(scope="module")
def inputs(tmp_path_factory: pytest.TempPathFactory) -> Path:
    folder = tmp_path_factory.mktemp("catalogue") / "in"
    _write_inputs(folder)
    return folder


def _hashes(folder: Path) -> dict[str, str]:
    """Every file below `folder` (relative path) -> its SHA-256."""
    return {
        str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    }


@dataclass(frozen=True)
class Case:
    """One bad input and the outcome expected of it."""

    name: str
    args: list[str]
    """Arguments; `{in}` is the inputs folder, `{out}` an empty output folder."""
    code: int
    names: tuple[str, ...]
    """Texts the one stderr line must hold (the file, column, term or option)."""
    creates: tuple[str, ...] = field(default=())
    """Files (relative to `{out}`) the command must create; none by default."""


def _case(name: str, args: str | list[str], code: int, *names: str) -> Case:
    return Case(name, args.split() if isinstance(args, str) else args, code, names)


def _where_case(name: str, where: str, *names: str) -> Case:
    return _case(name, ["fit", "{in}/deliveries.parquet", *MODEL, "--where", where], 2, *names)


CASES: list[Case] = [
    # -- files: missing, empty, cut short, random bytes, wrong kinds --------------------------
    _case("fit-missing-file", "fit {in}/nowhere.parquet -y minutes -x stops", 2, "nowhere.parquet"),
    _case("fit-empty-parquet", "fit {in}/empty.parquet -y minutes -x stops", 2, "empty.parquet"),
    _case("fit-empty-csv", "fit {in}/empty.csv -y minutes -x stops", 2, "empty.csv"),
    _case("fit-empty-arrow", "fit {in}/empty.arrow -y minutes -x stops", 2, "empty.arrow"),
    _case(
        "fit-cut-parquet",
        "fit {in}/cut-deliveries.parquet -y minutes -x stops",
        2,
        "cut-deliveries.parquet",
    ),
    _case(
        "report-cut-arrow",
        "report {in}/cut-deliveries.arrow -y minutes -x stops",
        2,
        "cut-deliveries.arrow",
    ),
    _case(
        "compare-noise-parquet",
        ["compare", "{in}/noise.parquet", "-y", "minutes", "-x", "stops", "-x", "distance_km"],
        2,
        "noise.parquet",
    ),
    _case(
        "export-empty-csv",
        "export {in}/empty.csv -y minutes -x stops --worst 5 --out {out}/w.csv",
        2,
        "empty.csv",
    ),
    _case("fit-unknown-extension", "fit {in}/table.xlsx -y minutes -x stops", 2, "table.xlsx"),
    _case("fit-empty-folder", "fit {in}/hollow -y minutes -x stops", 2, "hollow"),
    _case(
        "fit-glob-no-match", ["fit", "{in}/parts/*.pq", "-y", "minutes", "-x", "stops"], 2, "*.pq"
    ),
    _case(
        "fit-glob-not-parquet",
        ["fit", "{in}/mixed/*", "-y", "minutes", "-x", "stops"],
        2,
        "notes.txt",
    ),
    _case(
        "report-folder-damaged-part",
        "report {in}/damaged -y minutes -x stops --rows all",
        2,
        "part-1.parquet",
    ),
    _case("fit-latin1-csv", "fit {in}/latin1.csv -y minutes -x depot", 2, "latin1.csv"),
    _case("fit-ragged-csv", "fit {in}/ragged.csv -y minutes -x stops", 2, "ragged.csv"),
    _case(
        "fit-csv-wrong-separator",
        ["fit", "{in}/deliveries.csv", "--separator", ";", "-y", "minutes", "-x", "stops"],
        2,
        "minutes",
    ),
    _case(
        "fit-header-only-csv",
        "fit {in}/header-only.csv -y minutes -x stops",
        2,
        "minutes",
        "header",
    ),
    _case("fit-target-all-missing", "fit {in}/no-target.parquet -y minutes -x stops", 2, "minutes"),
    _case(
        "report-stray-text-csv",
        "report {in}/stray-text.csv -y minutes -x stops",
        2,
        "n/a?",
        "--null-value",
    ),
    # -- columns, types and terms --------------------------------------------------------------
    _case(
        "fit-unknown-target",
        "fit {in}/deliveries.parquet -y minutse -x stops",
        2,
        "minutse",
        "minutes",
    ),
    _case(
        "fit-unknown-term", "fit {in}/deliveries.parquet -y minutes -x stpos", 2, "stpos", "stops"
    ),
    _case("fit-text-target", "fit {in}/deliveries.parquet -y depot -x stops", 2, "depot"),
    _case(
        "fit-log-of-text",
        ["fit", "{in}/deliveries.parquet", "-y", "minutes", "-x", "log(depot)"],
        2,
        "depot",
    ),
    _case(
        "fit-log-of-zero",
        ["fit", "{in}/odd.parquet", "-y", "minutes", "-x", "log(zeros)"],
        2,
        "log(zeros)",
        "--drop-invalid",
    ),
    _case(
        "fit-unknown-transform",
        ["fit", "{in}/deliveries.parquet", "-y", "minutes", "-x", "cube(stops)"],
        2,
        "cube",
    ),
    _case(
        "fit-term-with-newline",
        ["fit", "{in}/deliveries.parquet", "-y", "minutes", "-x", "stops +\nhour"],
        2,
        "\\n",
    ),
    _case(
        "fit-term-with-escape",
        ["fit", "{in}/deliveries.parquet", "-y", "minutes", "-x", "st\x1b[2Jops"],
        2,
        "\\x1b",
    ),
    _case("fit-no-target", "fit {in}/deliveries.parquet -x stops", 2, "target ~"),
    _case("fit-constant-target", "fit {in}/odd.parquet -y flat -x stops", 2, "flat"),
    _case("fit-huge-predictor", "fit {in}/odd.parquet -y minutes -x huge", 2, "huge"),
    _case("report-huge-target", "report {in}/odd.parquet -y huge -x stops", 2, "huge"),
    _case(
        "compare-huge-term",
        ["compare", "{in}/odd.parquet", "-y", "minutes", "-x", "stops", "-x", "stops, huge"],
        2,
        "huge",
    ),
    _case(
        "fit-text-weights",
        "fit {in}/deliveries.parquet -y minutes -x stops --weights depot",
        2,
        "depot",
    ),
    _case(
        "fit-negative-weights",
        "fit {in}/odd.parquet -y minutes -x stops --weights signed_w",
        2,
        "signed_w",
    ),
    _case(
        "fit-reference-unknown-level",
        "fit {in}/deliveries.parquet -y minutes -x depot --reference depot=mars",
        2,
        "mars",
    ),
    _case(
        "fit-reference-no-equals",
        "fit {in}/deliveries.parquet -y minutes -x depot --reference depot",
        2,
        "--reference",
    ),
    _case(
        "fit-indicator-unknown-level",
        ["fit", "{in}/deliveries.parquet", "-y", "minutes", "-x", "stops, depot=mars"],
        2,
        "`depot`",
        "mars",
    ),
    _case(
        "fit-indicator-unknown-level-every-row",
        ["fit", "{in}/deliveries.parquet", "-y", "minutes", "-x", "depot=mars", "--rows", "all"],
        2,
        "`depot`",
        "mars",
    ),
    _case(
        "fit-indicator-level-not-a-number",
        ["fit", "{in}/deliveries.parquet", "-y", "minutes", "-x", "stops, hour=noon"],
        2,
        "hour=noon",
    ),
    _case(
        "fit-indicator-beside-its-categorical",
        ["fit", "{in}/deliveries.parquet", "-y", "minutes", "-x", "depot, depot[north]"],
        2,
        "depot=north",
    ),
    _case(
        "fit-too-many-levels", "fit {in}/odd.parquet -y minutes -x note", 2, "note", "--max-levels"
    ),
    _where_case("fit-where-unknown-column", "dept = 'north'", "dept"),
    _where_case("fit-where-syntax", "minutes >", "minutes >"),
    _where_case("fit-where-python", "__import__('os').system('true')", "__import__"),
    _where_case("fit-where-keeps-nothing", "depot = 'mars'", "depot = 'mars'"),
    _where_case("fit-where-newline", "stops >\n1000", "\\n"),
    # -- options -------------------------------------------------------------------------------
    _case("fit-rows-zero", "fit {in}/deliveries.parquet -y minutes -x stops --rows 0", 2, "--rows"),
    _case(
        "fit-rows-text", "fit {in}/deliveries.parquet -y minutes -x stops --rows many", 2, "--rows"
    ),
    _case(
        "fit-seed-negative",
        "fit {in}/deliveries.parquet -y minutes -x stops --seed -1",
        2,
        "--seed",
    ),
    _case(
        "fit-sample-unknown",
        "fit {in}/deliveries.parquet -y minutes -x stops --sample random",
        2,
        "--sample",
    ),
    _case(
        "fit-holdout-above-one",
        "fit {in}/deliveries.parquet -y minutes -x stops --holdout 1.5",
        2,
        "--holdout",
    ),
    _case(
        "fit-cut-without-column",
        "fit {in}/deliveries.parquet -y minutes -x stops --cut 3",
        2,
        "--holdout-by",
    ),
    _case(
        "fit-unknown-option",
        "fit {in}/deliveries.parquet -y minutes -x stops --colour",
        2,
        "--colour",
    ),
    _case("fit-no-data", "fit", 2, "DATA"),
    _case(
        "report-unknown-by",
        "report {in}/deliveries.parquet -y minutes -x stops --by dept",
        2,
        "dept",
        "depot",
    ),
    _case(
        "report-top-zero", "report {in}/deliveries.parquet -y minutes -x stops --top 0", 2, "--top"
    ),
    _case(
        "compare-folds-one",
        ["compare", "{in}/deliveries.parquet", "-y", "minutes", "-x", "stops", "--folds", "1"],
        2,
        "--folds",
    ),
    _case(
        "compare-unknown-term",
        [
            "compare",
            "{in}/deliveries.parquet",
            "-y",
            "minutes",
            "-x",
            "stops",
            "-x",
            "stops, wieght_kg",
        ],
        2,
        "wieght_kg",
        "weight_kg",
    ),
    _case(
        "compare-holdout-by-unknown",
        [
            "compare",
            "{in}/deliveries.parquet",
            "-y",
            "minutes",
            "-x",
            "stops",
            "--holdout-by",
            "dayz",
            "--cut",
            "3",
        ],
        2,
        "dayz",
    ),
    # -- export destinations ---------------------------------------------------------------------
    _case(
        "export-no-out", "export {in}/deliveries.parquet -y minutes -x stops --worst 5", 2, "--out"
    ),
    _case(
        "export-worst-zero",
        "export {in}/deliveries.parquet -y minutes -x stops --worst 0 --out {out}/w.csv",
        2,
        "--worst",
    ),
    _case(
        "export-unknown-format",
        "export {in}/deliveries.parquet -y minutes -x stops --worst 5 --out {out}/w.xlsx",
        2,
        "w.xlsx",
    ),
    _case(
        "export-missing-folder",
        "export {in}/deliveries.parquet -y minutes -x stops --worst 5 --out {out}/no/w.csv",
        2,
        "no",
    ),
    _case(
        "export-onto-input",
        "export {in}/deliveries.csv -y minutes -x stops --worst 5 "
        "--out {in}/deliveries.csv --force",
        2,
        "deliveries.csv",
    ),
    _case(
        "export-into-input-folder",
        "export {in}/parts -y minutes -x stops --all --out {in}/parts/diag.parquet",
        2,
        "parts",
    ),
    _case(
        "export-matching-input-glob",
        [
            "export",
            "{in}/parts/*.parquet",
            "-y",
            "minutes",
            "-x",
            "stops",
            "--all",
            "--out",
            "{in}/parts/diag.parquet",
        ],
        2,
        "*.parquet",
    ),
    _case(
        "export-matching-recursive-glob",
        [
            "export",
            "{in}/**/part-*.parquet",
            "-y",
            "minutes",
            "-x",
            "stops",
            "--worst",
            "3",
            "--out",
            "{in}/part-new.parquet",
        ],
        2,
        "part-*.parquet",
    ),
    _case(
        "export-existing-without-force",
        "export {in}/deliveries.parquet -y minutes -x stops --worst 5 --out {in}/exists.csv",
        2,
        "exists.csv",
        "--force",
    ),
    _case(
        "export-out-is-folder",
        "export {in}/deliveries.parquet -y minutes -x stops --worst 5 --out {in}/hollow",
        2,
        "hollow",
    ),
    # -- sample ------------------------------------------------------------------------------------
    _case("sample-rows-zero", "sample --rows 0 --out {out}/s.parquet", 2, "--rows"),
    _case("sample-unknown-format", "sample --rows 10 --out {out}/s.json", 2, "s.json"),
    _case("sample-missing-folder", "sample --rows 10 --out {out}/no/s.parquet", 2, "no"),
    _case("sample-existing", "sample --rows 10 --out {in}/exists.csv", 2, "exists.csv"),
    _case(
        "sample-row-groups-zero",
        "sample --rows 10 --row-group-rows 0 --out {out}/s.parquet",
        2,
        "--row-group-rows",
    ),
    # A CSV cut mid-row reads as complete rows plus one short row, whose missing fields
    # leave it out (counted with the rows dropped for missing values): nothing to refuse.
    Case("fit-cut-csv", ["fit", "{in}/cut-deliveries.csv", *MODEL, "--rows", "all"], 0, ()),
    # -- what works, so the checks above cannot pass on a harness that fails everything ---------
    Case("fit-good", ["fit", "{in}/deliveries.parquet", *MODEL], 0, ()),
    Case(
        "export-good",
        ["export", "{in}/deliveries.csv", *MODEL, "--worst", "4", "--out", "{out}/w.csv"],
        0,
        (),
        ("w.csv", "w.csv.fit.txt"),  # the export and its note naming the fit
    ),
]
"""The catalogue."""


def _run_in_process(args: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    try:
        code = main(args)
    except SystemExit as stop:  # argparse's own exit (usage errors)
        code = int(stop.code or 0)
    out, err = capsys.readouterr()
    return code, out, err


def _check_stderr(err: str, code: int, names: tuple[str, ...]) -> None:
    assert "Traceback" not in err
    assert "Warning" not in err
    lines = [line for line in err.splitlines() if line.strip()]
    if code == 0:
        assert all(line.startswith(("note:", "triage: note")) for line in lines), err
        return
    assert len(lines) == 1, err
    line = lines[0]
    assert line.startswith("triage"), line
    assert ";" in line, f"no hint after the message: {line}"
    for name in names:
        assert name in line, f"{name!r} not named in: {line}"


def _expand(args: list[str], inputs: Path, out: Path) -> list[str]:
    return [a.replace("{in}", str(inputs)).replace("{out}", str(out)) for a in args]


@pytest.mark.parametrize("case", CASES, ids=[c.name for c in CASES])
def test_faults_catalogue(
    case: Case, inputs: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "out"
    out.mkdir()
    before = _hashes(inputs)
    code, _, err = _run_in_process(_expand(case.args, inputs, out), capsys)
    assert code == case.code, err
    _check_stderr(err, code, case.names)
    assert _hashes(inputs) == before
    assert sorted(p.name for p in out.rglob("*")) == sorted(case.creates)


def test_faults_catalogue_is_large_enough() -> None:
    commands = {c.args[0] for c in CASES}
    assert len(CASES) >= 50
    assert commands == {"fit", "report", "compare", "export", "sample"}


# -- files changed while a pass reads them (in-process, at a known batch) ------------------------


def _truncate(path: Path) -> None:
    os.truncate(path, path.stat().st_size // 2)


def _append_row(path: Path) -> None:
    with path.open("a") as handle:
        handle.write("1,north,van,9,1.0,1,1.0,10.0\n")  # one more delivery run


def _replace(path: Path) -> None:
    """Replace the file by a copy of itself (same bytes, a new file), as a sync tool does."""
    copy = path.with_name(path.name + ".new")
    shutil.copy2(path, copy)
    os.replace(copy, path)


@dataclass(frozen=True)
class Change:
    """A file changed at batch `at` of a command."""

    name: str
    args: list[str]
    changed: str
    """The input (relative to `{in}`) that is changed."""
    change: Callable[[Path], None]
    at: int


CHANGES = [
    Change(
        "fit-parquet-cut",
        ["fit", "{in}/deliveries.parquet", *MODEL, "--rows", "all"],
        "deliveries.parquet",
        _truncate,
        2,
    ),
    Change(
        "report-folder-part-replaced",
        ["report", "{in}/parts", *MODEL, "--rows", "all"],
        "parts/part-1.parquet",
        _replace,
        2,
    ),
    Change(
        "export-csv-appended",
        [
            "export",
            "{in}/deliveries.csv",
            *MODEL,
            "--all",
            "--rows",
            "all",
            "--out",
            "{out}/d.parquet",
        ],
        "deliveries.csv",
        _append_row,
        1,
    ),
    Change(
        "compare-arrow-cut",
        [
            "compare",
            "{in}/deliveries.arrow",
            "-y",
            "minutes",
            "-x",
            "stops",
            "-x",
            "stops, depot",
            "--rows",
            "all",
        ],
        "deliveries.arrow",
        _truncate,
        3,
    ),
    Change(
        "export-worst-glob-replaced",
        [
            "export",
            "{in}/parts/*.parquet",
            *MODEL,
            "--worst",
            "5",
            "--rows",
            "all",
            "--out",
            "{out}/w.csv",
        ],
        "parts/part-0.parquet",
        _replace,
        1,
    ),
]


@pytest.fixture
def hook_off() -> Iterator[None]:
    yield
    hooks.set_batch_hook(None)


@pytest.mark.parametrize("case", CHANGES, ids=[c.name for c in CHANGES])
def test_faults_file_changed_mid_pass(
    case: Change, tmp_path: Path, capsys: pytest.CaptureFixture[str], hook_off: None
) -> None:
    inputs, out = tmp_path / "in", tmp_path / "out"
    out.mkdir()
    _write_inputs(inputs)
    changed = inputs / case.changed
    before = _hashes(inputs)

    def change_once(path: Path, batch: int) -> None:
        if batch == case.at:
            case.change(changed)

    hooks.set_batch_hook(change_once)
    code, _, err = _run_in_process(_expand(case.args, inputs, out), capsys)
    assert code == 2, err
    _check_stderr(err, code, (case.changed.split("/")[-1], "changed while it was being read"))
    assert list(out.iterdir()) == []
    after = _hashes(inputs)
    del before[case.changed], after[case.changed]
    assert after == before  # only the file the test changed differs; no temporary left


# -- destinations that cannot take the export (root only: a small tmpfs) --------------------------


@pytest.fixture
def small_disk(tmp_path: Path) -> Iterator[Callable[[str], Path]]:
    """Mount tmpfs folders (read-only, or of a few kB); skip where that is not allowed."""
    if not hasattr(os, "geteuid") or os.geteuid() != 0 or shutil.which("mount") is None:
        pytest.skip("not root, or no mount(8)")
    mounted: list[Path] = []

    def mount(options: str) -> Path:
        point = tmp_path / f"disk{len(mounted)}"
        point.mkdir()
        done = subprocess.run(
            ["mount", "-t", "tmpfs", "-o", options, "tmpfs", str(point)],
            capture_output=True,
            check=False,
        )
        if done.returncode != 0:
            pytest.skip("tmpfs mount refused")
        mounted.append(point)
        return point

    yield mount
    for point in mounted:
        subprocess.run(["umount", str(point)], check=False)


@pytest.mark.parametrize(
    ("options", "args", "names"),
    [
        (
            "ro,size=64k",
            ["export", "{in}/deliveries.parquet", *MODEL, "--worst", "5", "--out", "{disk}/w.csv"],
            ("disk",),
        ),
        (
            "size=16k",
            ["export", "{in}/deliveries.parquet", *MODEL, "--all", "--out", "{disk}/all.csv"],
            ("all.csv",),
        ),
        ("size=16k", ["sample", "--rows", "20000", "--out", "{disk}/s.csv"], ("s.csv",)),
    ],
    ids=["export-read-only", "export-disk-full", "sample-disk-full"],
)
def test_faults_destination_cannot_take_it(
    options: str,
    args: list[str],
    names: tuple[str, ...],
    inputs: Path,
    small_disk: Callable[[str], Path],
    capsys: pytest.CaptureFixture[str],
) -> None:
    disk = small_disk(options)
    before = _hashes(inputs)
    argv = [a.replace("{disk}", str(disk)) for a in _expand(args, inputs, disk)]
    code, _, err = _run_in_process(argv, capsys)
    assert code == 2, err
    _check_stderr(err, code, names)
    assert list(disk.iterdir()) == []
    assert _hashes(inputs) == before


# -- signals at a known batch (a child process, paused there) -------------------------------------


def _run_paused(args: list[str], at: int, signum: int) -> tuple[int, str]:
    """Run triage in a child that stops at batch `at`, send it `signum`, let it go on; return
    its exit code and stderr."""
    report_read, report_write = os.pipe()
    go_read, go_write = os.pipe()
    env = {
        **os.environ,
        "PYTHONPATH": str(ROOT),
        hooks.PAUSE_ENVIRONMENT: f"{at},{report_write},{go_read}",
    }
    child = subprocess.Popen(
        [sys.executable, "-m", "triage", *args],
        env=env,
        pass_fds=(report_write, go_read),
        stdout=subprocess.DEVNULL,
        stderr=subprocess.PIPE,
    )
    os.close(report_write)
    os.close(go_read)
    try:
        assert os.read(report_read, 1) == b"k", "the child ended before the batch"
        child.send_signal(signum)
        os.write(go_write, b"g")
        _, err = child.communicate(timeout=60)
    finally:
        os.close(report_read)
        os.close(go_write)
        if child.poll() is None:
            child.kill()
    return child.returncode, err.decode()


@pytest.mark.parametrize(
    ("signum", "at", "args"),
    [
        (
            signal.SIGINT,
            3,
            [
                "export",
                "{in}/deliveries.parquet",
                *MODEL,
                "--all",
                "--rows",
                "all",
                "--out",
                "{out}/d.parquet",
            ],
        ),
        (
            signal.SIGTERM,
            3,
            ["export", "{in}/parts", *MODEL, "--all", "--rows", "all", "--out", "{out}/d.csv"],
        ),
        (signal.SIGHUP, 2, ["report", "{in}/deliveries.csv", *MODEL, "--rows", "all"]),
        (signal.SIGTERM, 3, ["fit", "{in}/deliveries.arrow", *MODEL, "--rows", "all"]),
    ],
    ids=["export-sigint", "export-sigterm", "report-sighup", "fit-sigterm"],
)
def test_faults_signal_mid_pass(
    signum: signal.Signals, at: int, args: list[str], inputs: Path, tmp_path: Path
) -> None:
    out = tmp_path / "out"
    out.mkdir()
    before = _hashes(inputs)
    code, err = _run_paused(_expand(args, inputs, out), at=at, signum=signum)
    assert code == 128 + signum, err
    _check_stderr(err, code, (signum.name, "no file was written"))
    assert list(out.iterdir()) == []
    assert _hashes(inputs) == before


# -- the pieces under the catalogue --------------------------------------------------------------


def test_faults_bus_error_is_one_line_and_exit_2(tmp_path: Path) -> None:
    """A read of a memory-mapped file past its new end (SIGBUS) ends the process cleanly.

    polars maps files into memory, but when it touches a page past a truncated end is up to
    its threads' timing; the child here maps the file itself, inside a source's read and an
    export under way, so the bus error happens at a known point.
    """
    data = tmp_path / "runs.csv"
    data.write_text("minutes,stops\n" + "12.5,3\n" * 200_000)
    script = f"""
import mmap, os
import polars as pl
from triage.data.bus_guard import install_bus_guard
from triage.data.export import StreamingExport
from triage.data.source import open_source
install_bus_guard()
source = open_source({str(data)!r})
with StreamingExport({str(tmp_path / "out.parquet")!r}) as export:
    export.write(pl.DataFrame({{"row": [0]}}))
    for batch in source.scan_batches(["minutes"]):
        mapped = mmap.mmap(os.open({str(data)!r}, os.O_RDONLY), 0, access=mmap.ACCESS_READ)
        os.truncate({str(data)!r}, 10)
        print(mapped[1_000_000])
"""
    done = subprocess.run(
        [sys.executable, "-c", script],
        env={**os.environ, "PYTHONPATH": str(ROOT)},
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert done.returncode == 2, done.stderr
    _check_stderr(done.stderr, 2, ("runs.csv", "cut short"))
    assert sorted(p.name for p in tmp_path.iterdir()) == ["runs.csv"]  # no export, no temporary


def test_faults_one_line_escapes_control_characters() -> None:
    from triage.errors import SpecError

    message = str(SpecError("unknown term `a\nb\tc\x1b[31m\u2028`; check it"))
    assert message == "unknown term `a\\nb\\tc\\x1b[31m\\u2028`; check it"
    assert message.isprintable()


@pytest.mark.parametrize(
    ("out", "pattern", "is_refused"),
    [
        ("data/new.parquet", "data/*.parquet", True),
        ("data/new.csv", "data/*.parquet", False),
        ("data/2024/x.parquet", "data/**/*.parquet", True),
        ("data/x.parquet", "data/**/*.parquet", True),  # ** matches no folder too
        ("data/2024/x.parquet", "data/*.parquet", False),
        ("elsewhere/x.parquet", "data/*.parquet", False),
        ("data/p-7.pq", "data/p-?.pq", True),
        ("data/q.parquet", "data/[pq].parquet", True),
    ],
)
def test_faults_export_refuses_paths_an_input_glob_matches(
    out: str, pattern: str, is_refused: bool, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    from triage.data.export import check_output_path
    from triage.errors import ExportError

    monkeypatch.chdir(tmp_path)
    (tmp_path / out).parent.mkdir(parents=True, exist_ok=True)
    if is_refused:
        with pytest.raises(ExportError, match="matches the input"):
            check_output_path(out, protected=[pattern])
    else:
        assert check_output_path(out, protected=[pattern]) == Path(out)


def test_faults_values_below_the_limit_fit_like_numpy_and_above_it_are_refused(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """At 1e60 a report agrees with numpy's lstsq (oracle) and warns of nothing; 1e90 is refused."""
    rng = np.random.default_rng(5)
    n = 2_000
    distance = rng.gamma(2.0, 6.0, size=n)
    minutes = 6 + 0.9 * distance + rng.normal(size=n)
    for scale, code in ((1e60, 0), (1e90, 2)):
        path = tmp_path / f"scaled-{scale:.0e}.parquet"
        pl.DataFrame({"distance": distance * scale, "minutes": minutes * scale}).write_parquet(path)
        args = ["report", str(path), "-y", "minutes", "-x", "distance", "--json", "--rows", "all"]
        got, out, err = _run_in_process(args, capsys)
        assert got == code, err
        assert "Warning" not in err
        if code == 0:
            estimates = {c["term"]: c["estimate"] for c in json.loads(out)["coefficients"]}
            x = np.column_stack([np.ones(n), distance])
            expected, *_ = np.linalg.lstsq(x, minutes, rcond=None)
            assert estimates["distance"] == pytest.approx(expected[1], rel=1e-9)
            assert estimates["intercept"] / scale == pytest.approx(expected[0], rel=1e-9)
        else:
            _check_stderr(err, code, ("`distance`", "1e+70"))


def test_faults_nonfinite_standard_error_leaves_t_and_p_unknown() -> None:
    """A standard error that overflows never stands beside a finite t and p."""
    from triage.core.lsq import fit_arrays

    rng = np.random.default_rng(9)
    x = np.column_stack([np.ones(50), rng.normal(size=50)])
    y = (1.0 + x[:, 1] + rng.normal(size=50)) * 1e160  # the residual sum of squares overflows
    with np.errstate(all="ignore"):
        fit = fit_arrays(x, y, ["intercept", "x"], has_intercept=True)
    assert not np.isfinite(fit.std_error).any()
    assert np.isnan(fit.t).all() and np.isnan(fit.p).all()
    assert np.isnan(fit.ci_low).all() and np.isnan(fit.ci_high).all()
