"""The command line: exit codes, one-line errors, JSON contracts (issues 2 and 3).

Numbers in the JSON are checked against statsmodels (oracle) on scikit-learn's bundled
diabetes data (`sklearn.datasets.load_diabetes`, shipped inside the scikit-learn wheel).
Error cases use small frames written in the test: they check behaviour, not numbers.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import polars as pl
import pytest
import statsmodels.api as sm
from sklearn.datasets import load_diabetes

from tests.json_contract import COEFFICIENT_KEYS, FIT_KEYS, FIT_SECTIONS, REPORT_KEYS
from triage.cli.main import main


@pytest.fixture(scope="module")
def diabetes(tmp_path_factory: pytest.TempPathFactory) -> Path:
    bunch = load_diabetes(scaled=False)
    frame = pl.DataFrame(bunch.data, schema=list(bunch.feature_names)).with_columns(
        target=pl.Series(bunch.target),
        sex=pl.Series(bunch.data[:, 1]).cast(pl.Int64).cast(pl.String),
    )
    path = tmp_path_factory.mktemp("diabetes") / "diabetes.parquet"
    frame.write_parquet(path, row_group_size=100)
    return path


@pytest.fixture
def small(tmp_path: Path) -> Path:
    rng = np.random.default_rng(7)
    n = 120
    frame = pl.DataFrame(
        {
            "y": rng.normal(size=n),
            "x": rng.normal(size=n),
            "signed": rng.normal(size=n),
            "label": [f"p{i}" for i in range(n)],
            "flat": np.full(n, 3.0),
            "many": [f"g{i % 60}" for i in range(n)],
        }
    )
    path = tmp_path / "small.parquet"
    frame.write_parquet(path)
    return path


def run_cli(args: list[str], capsys: pytest.CaptureFixture[str]) -> tuple[int, str, str]:
    code = main(args)
    out, err = capsys.readouterr()
    return code, out, err


def test_cli_fit_json_matches_statsmodels(
    diabetes: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = run_cli(
        ["fit", str(diabetes), "--target", "target", "--terms", "age, bmi, bp, s1, s5", "--json"],
        capsys,
    )
    assert code == 0
    document = json.loads(out)
    assert document.keys() >= FIT_KEYS
    for section, keys in FIT_SECTIONS.items():
        assert document[section].keys() >= keys, section
    assert all(c.keys() >= COEFFICIENT_KEYS for c in document["coefficients"])
    assert document["coefficients"][0]["term"] == "intercept"
    assert document["data"]["sample"] is None  # 442 rows: every row is read

    bunch = load_diabetes(scaled=False)
    x = bunch.data[:, [0, 2, 3, 4, 8]]
    oracle = sm.OLS(bunch.target, sm.add_constant(x)).fit()  # statsmodels as oracle
    estimates = [c["estimate"] for c in document["coefficients"]]
    errors = [c["std_error"] for c in document["coefficients"]]
    np.testing.assert_allclose(estimates, oracle.params, rtol=1e-9)
    np.testing.assert_allclose(errors, oracle.bse, rtol=1e-9)
    np.testing.assert_allclose(document["fit"]["r2"], oracle.rsquared, rtol=1e-10)
    np.testing.assert_allclose(document["fit"]["aic"], oracle.aic, rtol=1e-10)
    np.testing.assert_allclose(document["fit"]["bic"], oracle.bic, rtol=1e-10)
    np.testing.assert_allclose(document["fit"]["f"], oracle.fvalue, rtol=1e-9)


def test_cli_report_json_has_every_key(diabetes: Path, capsys: pytest.CaptureFixture[str]) -> None:
    code, out, _ = run_cli(
        [
            "report",
            str(diabetes),
            "-y",
            "target",
            "-x",
            "age, bmi, bp",
            "--by",
            "sex",
            "--top",
            "5",
            "--json",
        ],
        capsys,
    )
    assert code == 0
    document = json.loads(out)
    assert document.keys() >= REPORT_KEYS
    assert set(document["robust_se"]) == {"HC0", "HC1", "HC2", "HC3"}
    assert set(document["tests"]) == {"breusch_pagan", "reset", "jarque_bera", "durbin_watson"}
    assert set(document["worst"]) == {"abs_resid", "studentized", "leverage", "cooks"}
    assert all(len(rows) == 5 for rows in document["worst"].values())
    assert {"level", "n", "mean_resid", "rmse", "t"} <= document["segments"]["sex"][0].keys()
    assert {"fitted", "age", "bmi", "bp"} <= document["binned"].keys()
    bunch = load_diabetes(scaled=False)
    oracle = sm.OLS(bunch.target, sm.add_constant(bunch.data[:, [0, 2, 3]])).fit()
    np.testing.assert_allclose(  # statsmodels HC3 as oracle
        list(document["robust_se"]["HC3"].values()), oracle.HC3_se, rtol=1e-8
    )
    worst = oracle.get_influence().cooks_distance[0]
    assert document["worst"]["cooks"][0]["row"] == int(np.argmax(worst))


def test_cli_report_text_has_our_sections(
    diabetes: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = run_cli(
        ["report", str(diabetes), "-y", "target", "-x", "age, bmi, bp", "--width", "80"], capsys
    )
    assert code == 0
    assert "fit quality" in out and "coefficients" in out
    assert max(len(line) for line in out.splitlines()) <= 80


def test_cli_export_worst_rows_and_refuse_overwrite(
    diabetes: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_path = tmp_path / "worst.csv"
    args = [
        "export",
        str(diabetes),
        "-y",
        "target",
        "-x",
        "age, bmi, bp",
        "--worst",
        "7",
        "--out",
        str(out_path),
    ]
    code, _out, err = run_cli(args, capsys)
    assert code == 0
    assert "personal" in err
    written = pl.read_csv(out_path)
    assert written.height == 7
    assert {"age", "bmi", "row", "fitted", "resid", "studentized", "leverage", "cooks"} <= set(
        written.columns
    )
    bunch = load_diabetes(scaled=False)
    oracle = sm.OLS(bunch.target, sm.add_constant(bunch.data[:, [0, 2, 3]])).fit()
    cooks = oracle.get_influence().cooks_distance[0]
    expected = np.argsort(-cooks, kind="stable")[:7]
    assert written["row"].to_list() == expected.tolist()  # statsmodels Cook's distance as oracle
    np.testing.assert_allclose(written["cooks"].to_numpy(), cooks[expected], rtol=1e-8)
    code, _, err = run_cli(args, capsys)
    assert code == 2 and "--force" in err


def test_cli_export_all_rows_streams_every_row(
    diabetes: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out_path = tmp_path / "all.parquet"
    code, _, _ = run_cli(
        [
            "export",
            str(diabetes),
            "-y",
            "target",
            "-x",
            "age, bmi",
            "--all",
            "--out",
            str(out_path),
        ],
        capsys,
    )
    assert code == 0
    written = pl.read_parquet(out_path)
    assert written["row"].to_list() == list(range(442))
    bunch = load_diabetes(scaled=False)
    oracle = sm.OLS(bunch.target, sm.add_constant(bunch.data[:, [0, 2]])).fit()
    influence = oracle.get_influence()  # statsmodels OLSInfluence as oracle
    np.testing.assert_allclose(written["leverage"], influence.hat_matrix_diag, rtol=1e-8)
    np.testing.assert_allclose(
        written["studentized"], influence.resid_studentized_external, rtol=1e-8
    )


BAD_INPUTS = {
    "missing file": (["fit", "{dir}/absent.parquet", "-y", "y", "-x", "x"], "does not exist"),
    "corrupt file": (["fit", "{corrupt}", "-y", "y", "-x", "x"], "cannot read"),
    "unknown column": (["fit", "{small}", "-y", "y", "-x", "xx"], "closest: `x`"),
    "non-numeric target": (["fit", "{small}", "-y", "label", "-x", "x"], "must be numeric"),
    "log of non-positive": (["fit", "{small}", "-y", "y", "-x", "log(signed)"], "--drop-invalid"),
    "constant target": (["fit", "{small}", "-y", "flat", "-x", "x"], "does not vary"),
    "more terms than rows": (
        ["fit", "{small}", "-y", "y", "-x", "x, signed, label", "--max-levels", "200"],
        "coefficients but only",
    ),
    "every row filtered": (
        ["fit", "{small}", "-y", "y", "-x", "x", "--where", "x > 100"],
        "no rows left",
    ),
    "too many levels": (["fit", "{small}", "-y", "y", "-x", "many"], "--max-levels"),
    "invalid filter": (["fit", "{small}", "-y", "y", "-x", "x", "--where", "x >> 2"], "filter"),
    "code in filter": (
        [
            "fit",
            "{small}",
            "-y",
            "y",
            "-x",
            "x",
            "--where",
            "__import__('os').system('touch {dir}/pwned')",
        ],
        "filter",
    ),
    "unknown --by column": (
        ["report", "{small}", "-y", "y", "-x", "x", "--by", "lable"],
        "closest: `label`",
    ),
    "unwritable export path": (
        ["export", "{small}", "-y", "y", "-x", "x", "--worst", "3", "--out", "{dir}/no/such.csv"],
        "does not exist",
    ),
    "export onto the input": (
        ["export", "{small}", "-y", "y", "-x", "x", "--worst", "3", "--out", "{small}"],
        "input",
    ),
}


@pytest.mark.parametrize("case", sorted(BAD_INPUTS))
def test_cli_bad_input_exits_2_with_one_line(
    case: str, small: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    corrupt = tmp_path / "corrupt.parquet"
    corrupt.write_bytes(b"PAR1 not really parquet")
    before = sorted(p.name for p in tmp_path.iterdir())
    template, expected = BAD_INPUTS[case]
    args = [a.format(dir=tmp_path, small=small, corrupt=corrupt) for a in template]
    code, out, err = run_cli(args, capsys)
    assert code == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("triage: ")
    assert expected in lines[0]
    assert "Traceback" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == before  # nothing written


def test_cli_stops_quietly_when_its_reader_goes_away(diabetes: Path) -> None:
    # `triage fit ... --json | head`: a reader that has closed the pipe gets no traceback;
    # 141 is the shell's code for a command ended by SIGPIPE (128 + 13).
    import subprocess
    import sys

    args = ["fit", str(diabetes), "-y", "target", "-x", "bmi, bp", "--json"]
    command = [sys.executable, "-m", "triage", *args]
    with subprocess.Popen(command, stdout=subprocess.PIPE, stderr=subprocess.PIPE) as child:
        assert child.stdout is not None and child.stderr is not None
        child.stdout.close()
        err = child.stderr.read().decode()
        code = child.wait()
    assert code == 141
    assert "Traceback" not in err and "BrokenPipe" not in err


@pytest.mark.parametrize(
    ("args", "unknown"),
    [
        (["export", "{small}", "-y", "y", "-x", "x", "--worst", "3", "--by", "label"], "--by"),
        (["export", "{small}", "-y", "y", "-x", "x", "--worst", "3", "--ordered"], "--ordered"),
        (["open", "{small}", "--top-k", "5"], "--top-k"),
    ],
)
def test_cli_refuses_options_that_would_do_nothing(
    args: list[str], unknown: str, small: Path, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    argv = [a.format(small=small) for a in args]
    if argv[0] == "export":
        argv += ["--out", str(tmp_path / "w.csv")]
    with pytest.raises(SystemExit) as stop:
        main(argv)
    assert stop.value.code == 2
    assert f"unrecognized arguments: {unknown}" in capsys.readouterr().err
    assert not (tmp_path / "w.csv").exists()


def test_cli_open_takes_top_and_ordered_like_report(small: Path) -> None:
    from triage.cli.commands.open import settings_from_args
    from triage.cli.main import build_parser

    argv = ["open", str(small), "--top", "7", "--ordered", "--show", "label"]
    settings = settings_from_args(build_parser().parse_args(argv))
    assert settings.top_k == 7 and settings.is_ordered and settings.show == ("label",)


def test_cli_progress_line_names_the_pass_and_counts_its_rows_once() -> None:
    # Oracle: the line written out by hand from the numbers given.
    import io

    from triage.cli.progress import StderrProgress
    from triage.results.progress import PassProgress

    stream = io.StringIO()
    progress = StderrProgress(delay_s=0.0, stream=stream)
    progress(PassProgress(7_500_000, 20_000_000, 9.0, 2_500_000.0, 5.0, pass_number=2, n_passes=2))
    line = stream.getvalue()
    assert "pass 2 of 2: 7,500,000 of 20,000,000 rows" in line
    assert "2,500,000 rows/s, about 5 s left" in line


def _terminal_row(written: str) -> str:
    """What a terminal row shows after `written`: carriage returns, erase-to-end, overwrites."""
    row: list[str] = []
    cursor = 0
    for part in written.split("\r"):
        cursor = 0
        for piece_index, piece in enumerate(part.split("\x1b[K")):
            if piece_index:
                del row[cursor:]
            row[cursor : cursor + len(piece)] = list(piece)
            cursor += len(piece)
    return "".join(row)


def test_cli_progress_on_a_terminal_leaves_nothing_of_a_longer_line(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # Oracle: ECMA-48 (ANSI) terminal behaviour, emulated by `_terminal_row`: a carriage return
    # goes to the row's start, ESC [ K erases to its end. A shorter line once left the tail of
    # a longer one ("about 3 s leftt"), and a line wider than the terminal wrapped.
    import io
    import os

    from triage.cli import progress as progress_module
    from triage.results.progress import PassProgress

    class Terminal(io.StringIO):
        def isatty(self) -> bool:
            return True

    monkeypatch.setattr(
        progress_module.shutil, "get_terminal_size", lambda fallback: os.terminal_size((90, 24))
    )
    stream = Terminal()
    progress = progress_module.StderrProgress(delay_s=0.0, stream=stream)
    progress(PassProgress(375_000, 20_000_000, 1.0, 1_210_348.0, 160.0, pass_number=2, n_passes=2))
    progress(PassProgress(15_000_000, 20_000_000, 9.0, 1_596_501.0, 3.0, pass_number=2, n_passes=2))
    shown = _terminal_row(stream.getvalue())
    assert (
        shown
        == "triage: pass 2 of 2: 15,000,000 of 20,000,000 rows  1,596,501 rows/s, about 3 s left"
    )
    monkeypatch.setattr(
        progress_module.shutil, "get_terminal_size", lambda fallback: os.terminal_size((60, 24))
    )
    progress(PassProgress(16_000_000, 20_000_000, 9.5, 1_600_000.0, 2.0, pass_number=2, n_passes=2))
    assert len(_terminal_row(stream.getvalue())) == 59


def test_cli_progress_in_a_log_is_whole_lines_at_most_every_interval(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # A log file or pipe gets whole lines, no carriage returns, one per LOG_EVERY_S.
    import io

    from triage.cli import progress as progress_module
    from triage.results.progress import PassProgress

    clock = iter([0.0, 1.0, 2.0, 31.5, 40.0])
    monkeypatch.setattr(progress_module.time, "perf_counter", lambda: next(clock))
    stream = io.StringIO()  # not a terminal
    progress = progress_module.StderrProgress(delay_s=0.0, stream=stream)
    for done in (1_000, 2_000, 3_000, 4_000):
        progress(PassProgress(done, 4_000, 1.0, 1_000.0, None))
    progress.finish()
    lines = stream.getvalue().split("\n")
    assert "\r" not in stream.getvalue()
    assert [line.split(":")[1].strip() for line in lines if line] == [
        "1,000 of 4,000 rows  1,000 rows/s",
        "3,000 of 4,000 rows  1,000 rows/s",
    ]


@pytest.mark.parametrize("width", [60, 80])
def test_cli_fit_and_compare_text_keep_to_the_width(
    diabetes: Path, capsys: pytest.CaptureFixture[str], width: int
) -> None:
    # Oracle for a line's width: Unicode's East Asian Width (test_views.east_asian_cells).
    # `fit` and `compare` were laid out at 100 columns whatever the terminal, and a long
    # section title overran its rule by two cells.
    from tests.test_views import east_asian_cells

    long_model = "age, bmi, bp, s1, s2, s3, s4, s5, s6, square(bmi), log(bp)"
    runs = [
        ["fit", str(diabetes), "-y", "target", "-x", long_model],
        ["compare", str(diabetes), "-y", "target", "-x", long_model, "-x", "bmi, bp"],
        ["compare", str(diabetes), "-y", "target", "-x", long_model, "--robust"],
    ]
    for args in runs:
        code, out, _ = run_cli([*args, "--width", str(width)], capsys)
        assert code == 0
        widest = max(out.splitlines(), key=east_asian_cells)
        assert east_asian_cells(widest) <= width, widest


def test_cli_fit_holdout_prints_figures_not_a_table_for_one_model(
    small: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    code, out, _ = run_cli(["fit", str(small), "-y", "y", "-x", "x", "--holdout", "0.25"], capsys)
    assert code == 0
    assert "models side by side" not in out and "◆" not in out
    assert re.search(r"^held-out RMSE\s+\d", out, re.MULTILINE)


def test_cli_report_show_puts_identifying_columns_beside_the_worst_rows(
    small: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # Oracle: the same rows read back with polars by position.
    args = ["report", str(small), "-y", "y", "-x", "x", "--top", "4", "--show", "label,signed"]
    code, out, _ = run_cli([*args, "--json"], capsys)
    assert code == 0
    frame = pl.read_parquet(small)
    for rows in json.loads(out)["worst"].values():
        for row in rows:
            record = frame.row(row["row"], named=True)
            assert row["shown"] == {"label": record["label"], "signed": str(record["signed"])}
    code, out, _ = run_cli([*args, "--no-charts", "--width", "100"], capsys)
    block = out.split("largest residuals (absolute)")[1]
    header = block.split("\n")[1].split()
    assert header[:3] == ["row", "label", "signed"]
    first = json.loads(run_cli([*args, "--json"], capsys)[1])["worst"]["abs_resid"][0]
    assert first["shown"]["label"] in block.split("\n")[3]


def test_cli_report_show_refuses_unknown_or_too_many_columns(
    small: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    base = ["report", str(small), "-y", "y", "-x", "x", "--show"]
    code, _, err = run_cli([*base, "lable"], capsys)
    assert code == 2 and "closest: `label`" in err
    code, _, err = run_cli([*base, "label,signed,x"], capsys)
    assert code == 2 and "at most 2 columns" in err
