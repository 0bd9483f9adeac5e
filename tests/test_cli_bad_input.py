"""Bad input to every subcommand: one stderr line naming the file/field/value, exit code 2, nothing written.

The rule under test is the project's own CLI contract (README "Commands", DEVELOPERS.md
"Errors"): no physics value is checked here. Each case below was a traceback, a message that
did not name the cause, a late failure after the long work, or a silently accepted value,
found in the review of 2026-12 and fixed in the owning module.
"""
from __future__ import annotations

import io
import re
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import pandas as pd
import pytest

from tests.conftest import FAMILY_FB2
from waneguide.cli.main import main
from waneguide.core.atomic import check_output_dir, check_output_path
from waneguide.features.io import read_capture
from waneguide.operations.readings import read_readings
from waneguide.simulation.campaign import run_campaign
from waneguide.simulation.export import export_campaign_captures


def run_cli(*argv):
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        rc = main([str(a) for a in argv])
    return rc, out.getvalue(), err.getvalue()


def snapshot(folder: Path) -> dict:
    """Every file under ``folder`` with its bytes (to prove nothing was written or changed)."""
    return {p.relative_to(folder).as_posix(): p.read_bytes() for p in sorted(folder.rglob("*")) if p.is_file()}


@pytest.fixture(scope="module")
def work(tmp_path_factory):
    """A tiny campaign, a few exported captures and a set of bad inputs (about 2 s)."""
    w = tmp_path_factory.mktemp("badinput")
    run_campaign(FAMILY_FB2, 24, w / "camp", seed=3, n_jobs=1, progress=False)
    idx = export_campaign_captures(w / "camp", w / "caps", cases=range(4), fmt="csv")
    caps = w / "caps"
    first, base = caps / idx["file"].iloc[0], caps / idx["baseline_file"].iloc[0]
    # bad inputs
    (w / "folder.toml").mkdir()
    (w / "empty_dir").mkdir()
    (w / "binary.toml").write_bytes(b"\xff\xfe not text")
    (w / "empty.toml").write_text("")
    (w / "a_file").write_text("x\n")
    (w / "junk.mat").write_bytes(b"garbage")
    # a capture without sample_rate_hz (allowed: the rate then comes from the time column)
    lines = first.read_text().splitlines(keepends=True)
    (w / "no_rate.csv").write_text("".join(ln for ln in lines if not ln.startswith("# sample_rate_hz")))
    # measured-cases CSVs next to the captures
    rows = [(idx["file"].iloc[i], idx["max_loss_pct"].iloc[i], idx["max_loss_mm"].iloc[i], idx["mean_loss_pct"].iloc[i])
            for i in range(4)]
    head = "file,max_loss_pct,max_loss_mm,mean_loss_pct\n"
    zero = f"{base.name},0,0,0\n"  # the path's sound baseline: a zero-loss row
    (caps / "m_text.csv").write_text(head + f"{rows[0][0]},abc,{rows[0][2]},{rows[0][3]}\n" + zero)
    (caps / "m_negative.csv").write_text(head + f"{rows[0][0]},-5,{rows[0][2]},{rows[0][3]}\n" + zero)
    (caps / "m_one_case.csv").write_text(head + f"{rows[0][0]},{rows[0][1]},{rows[0][2]},{rows[0][3]}\n" + zero)
    (caps / "m_empty.csv").write_text("")
    (w / "r_ok.csv").write_text("path_id,date,position_mm,remaining_thickness_mm,method\nP01,2024-03-02,100,1.6,UT\n")
    return {"w": w, "caps": caps, "first": first, "base": base}


FAM = str(FAMILY_FB2)
TRAIN = ("--no-tracking", "--no-shift-study", "--no-progress")

# (argv with {w} = work folder, {caps}, {first}, {base}; the words the one line must contain)
CASES = [
    # a folder, or binary junk, where a family / material TOML is expected (was IsADirectoryError / no file name)
    (("simulate", "--family", "{w}/folder.toml", "--cases", "10", "--out", "{w}/new_camp"),
     ["folder.toml", "is a folder", ".toml file"]),
    (("simulate", "--family", "{w}/binary.toml", "--cases", "10", "--out", "{w}/new_camp"),
     ["binary.toml", "not UTF-8 text"]),
    (("dispersion", "--material", "{w}/folder.toml", "--thickness-mm", "1", "--fmax-khz", "100", "--out", "{w}/c.csv"),
     ["folder.toml", "is a folder", "built-in name"]),
    # several schema errors of one family file: one line, counted (was six lines)
    (("simulate", "--family", "{w}/empty.toml", "--cases", "10", "--out", "{w}/new_camp"),
     ["empty.toml", "6 problems", "family: Field required", "section: Field required"]),
    # output folder that is a file (was NotADirectoryError / FileExistsError)
    (("simulate", "--family", FAM, "--cases", "10", "--out", "{w}/a_file"), ["a_file", "is an existing file"]),
    (("train", "--family", FAM, "--campaign", "{w}/camp", "--out", "{w}/a_file", *TRAIN), ["model store", "a_file"]),
    (("demo", "--quick", "--out", "{w}/a_file"), ["demo output folder", "is an existing file"]),
    # output file that is a folder or lies under a file (was IsADirectoryError after the work was done)
    (("features", "--family", FAM, "--captures", "{first}", "--baselines", "{base}", "--out", "{w}/empty_dir"),
     ["feature table (--out)", "empty_dir", "existing folder"]),
    (("dispersion", "--material", "al-6061-t6", "--thickness-mm", "1", "--fmax-khz", "100", "--out", "{w}/c.csv",
      "--plot", "{w}/empty_dir"), ["plot (--plot)", "existing folder"]),
    (("score", "--model", "{w}/no_model", "--captures", "{first}", "--out", "{w}/a_file/r.csv"),
     ["results CSV (--out)", "which is a file"]),
    (("audit", "--model", "{w}/no_model", "--readings", "{w}/r_ok.csv", "--report", "{w}/empty_dir"),
     ["audit report (--report)", "existing folder"]),
    # missing capture folder (was "unsupported capture format '(no suffix)'")
    (("features", "--family", FAM, "--captures", "{first}", "--baselines", "{w}/no_such_dir", "--out", "{w}/f.parquet"),
     ["no_such_dir", "does not exist"]),
    # a corrupt .mat capture (was scipy's MatReadError, uncaught)
    (("features", "--family", FAM, "--captures", "{w}/junk.mat", "--baselines", "{base}", "--out", "{w}/f.parquet"),
     ["junk.mat", "not a readable MATLAB .mat file"]),
    # out-of-range settings (were accepted, or refused with a message naming nothing)
    (("features", "--family", FAM, "--captures", "{first}", "--baselines", "{base}", "--out", "{w}/f.parquet",
      "--jobs", "0"), ["--jobs", "got 0"]),
    (("train", "--family", FAM, "--campaign", "{w}/camp", "--out", "{w}/m", "--seed", "-1", *TRAIN),
     ["--seed", "non-negative", "got -1"]),
    (("train", "--family", FAM, "--campaign", "{w}/camp", "--out", "{w}/m", "--coverage", "1.5", *TRAIN),
     ["--coverage", "between 0 and 1", "1.5"]),
    (("audit", "--model", "{w}/no_model", "--readings", "{w}/r_ok.csv", "--limit-pct", "-5"),
     ["--limit-pct", "0 < L < 100", "-5"]),
    (("audit", "--model", "{w}/no_model", "--readings", "{w}/r_ok.csv", "--limit-pct", "150"),
     ["--limit-pct", "150"]),
    (("dispersion", "--material", "al-6061-t6", "--thickness-mm", "1", "--fmax-khz", "1e9", "--out", "{w}/c.csv"),
     ["MHz mm", "--fmax-khz"]),  # was an endless mode search
    # measured-cases CSV: checked before the fit (was after it, with misleading or nameless messages)
    (("train", "--family", FAM, "--campaign", "{w}/camp", "--out", "{w}/m", "--measured", "{caps}/m_text.csv", *TRAIN),
     ["m_text.csv", "row 2, column max_loss_pct", "'abc'"]),
    (("train", "--family", FAM, "--campaign", "{w}/camp", "--out", "{w}/m", "--measured", "{caps}/m_negative.csv",
      *TRAIN), ["m_negative.csv", "row 2, column max_loss_pct", "'-5'"]),
    (("train", "--family", FAM, "--campaign", "{w}/camp", "--out", "{w}/m", "--measured", "{caps}/m_one_case.csv",
      *TRAIN), ["m_one_case.csv", "target max_loss_pct has 1 measured case", "at least 2"]),
    (("train", "--family", FAM, "--campaign", "{w}/camp", "--out", "{w}/m", "--measured", "{caps}/m_empty.csv", *TRAIN),
     ["m_empty.csv", "not a readable measured-cases CSV"]),
    (("train", "--family", FAM, "--campaign", "{w}/camp", "--out", "{w}/m", "--measured", "{caps}", *TRAIN),
     ["measured CSV", "is not a file"]),
]


@pytest.mark.parametrize("argv, needles", CASES, ids=[f"{c[0][0]}-{i}" for i, c in enumerate(CASES)])
def test_bad_input_is_one_line_exit_2_and_writes_nothing(work, argv, needles):
    w = work["w"]
    fill = {k: str(v) for k, v in work.items()}
    argv = [a.format(**fill) for a in argv]
    before = snapshot(w)
    rc, out, err = run_cli(*argv)
    assert rc == 2, (out, err)
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert re.match(rf"waneguide {argv[0]}: error: ", lines[0]), err
    for needle in needles:
        assert needle in lines[0], (needle, lines[0])
    assert "Traceback" not in err
    assert snapshot(w) == before  # no partial output, no stored file touched


def test_model_store_is_not_created_by_a_bad_measured_csv(work):
    """The feature cache used to be written into --out before the measured CSV was read."""
    w = work["w"]
    rc, _, err = run_cli("train", "--family", FAM, "--campaign", w / "camp", "--out", w / "m_store",
                         "--measured", work["caps"] / "m_text.csv", *TRAIN)
    assert rc == 2 and "m_text.csv" in err
    assert not (w / "m_store").exists()


def test_capture_without_sample_rate_header_pairs_with_its_baseline(work, tmp_path):
    """docs/capture-format.md lets a CSV leave sample_rate_hz out (taken from the time column); the
    pair check compared the rates with ``!=`` and refused it with two identical-looking rates."""
    out = tmp_path / "f.parquet"
    rc, _, err = run_cli("features", "--family", FAM, "--captures", work["w"] / "no_rate.csv",
                         "--baselines", work["base"], "--out", out)
    assert rc == 0, err
    no_rate = read_capture(work["w"] / "no_rate.csv")
    with_rate = read_capture(work["first"])
    # the rate read from the time axis, (n - 1) / (t_last - t_first), is the header's to float rounding:
    # time_s is written in full (repr, 17 digits) and t = i / fs - pretrigger loses a few 1e-16 of the
    # span, so rel 1e-12 (an identity in floating point; common practice, no source)
    assert no_rate.sample_rate_hz == pytest.approx(with_rate.sample_rate_hz, rel=1e-12)
    assert len(pd.read_parquet(out)) == 1


def test_out_folder_check_keeps_an_interrupted_campaign_resumable(work, tmp_path):
    """check_output_dir refuses files only: an existing campaign folder is still accepted (resume)."""
    assert check_output_dir(work["w"] / "camp") == work["w"] / "camp"
    assert check_output_path(tmp_path / "new" / "deeper" / "x.csv") == tmp_path / "new" / "deeper" / "x.csv"
    with pytest.raises(ValueError, match="is an existing folder"):
        check_output_path(tmp_path)
    assert not (tmp_path / "new").exists()  # a check, not a mkdir


@pytest.mark.parametrize("text", ["2nd of March", "03/02/2024", "2024-13-01"])
def test_readings_date_must_be_iso_8601(tmp_path, text):
    """pd.Timestamp read '2nd of March' as year 1 (then 'nearest capture 738,885 days away') and
    03/02/2024 as March 2 (US order); the README promises ISO 8601 (ISO 8601-1:2019)."""
    f = tmp_path / "r_date.csv"
    f.write_text(f"path_id,date,position_mm,remaining_thickness_mm,method\nP01,{text},100,1.6,UT\n")
    with pytest.raises(ValueError, match=r"r_date.csv: line 2, column date: must be an ISO 8601 date"):
        read_readings(f)
    f.write_text("path_id,date,position_mm,remaining_thickness_mm,method\nP01,2024-03-02T10:00:00Z,100,1.6,UT\n")
    assert str(read_readings(f)["date"].iloc[0]) == "2024-03-02 10:00:00+00:00"
