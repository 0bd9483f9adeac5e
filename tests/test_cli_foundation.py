"""CLI of the foundation: ``materials`` and ``dispersion`` driven in-process."""
from __future__ import annotations

import io
from pathlib import Path
from contextlib import redirect_stderr, redirect_stdout

import numpy as np
import pandas as pd
import pytest

from waneguide.cli.main import main


def run_cli(*argv):
    out, err = io.StringIO(), io.StringIO()
    with redirect_stdout(out), redirect_stderr(err):
        rc = main(list(argv))
    return rc, out.getvalue(), err.getvalue()


def test_materials_csv_has_exact_columns():
    rc, out, _ = run_cli("materials", "--csv")
    assert rc == 0
    table = pd.read_csv(io.StringIO(out))
    assert list(table.columns) == ["name", "youngs_modulus_pa", "poisson_ratio", "density_kg_m3", "cl_m_s", "ct_m_s", "source"]
    row = table.set_index("name").loc["al-6061-t6"]
    # c_T = sqrt(E / (2 rho (1 + nu))) (Graff 1975, ch. 5) with the table's E, nu, rho
    assert row.ct_m_s == pytest.approx(np.sqrt(68.9e9 / (2 * 2700 * 1.33)), rel=1e-6)


def test_dispersion_csv_columns_and_modes(tmp_path):
    out_csv = tmp_path / "curves.csv"
    png = tmp_path / "curves.png"
    rc, out, err = run_cli("dispersion", "--material", "al-6061-t6", "--thickness-mm", "1.0",
                           "--fmax-khz", "6000", "--points", "300", "--out", str(out_csv), "--plot", str(png))
    assert rc == 0, err
    table = pd.read_csv(out_csv)
    assert list(table.columns) == ["mode", "frequency_hz", "fd_mhz_mm", "phase_velocity_m_s",
                                   "group_velocity_m_s", "wavenumber_rad_m"]
    # below 6 MHz*mm in aluminium: S0..S2 and A0..A2 (cut-offs n*cT/2, n*cL/2; Graff 1975 sec. 8.1)
    assert {"S0", "A0", "S1", "S2", "A1", "A2"} <= set(table["mode"])
    assert png.stat().st_size > 10_000 and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    np.testing.assert_allclose(table.fd_mhz_mm, table.frequency_hz * 1e-3 * 1e-3, rtol=1e-9)


@pytest.mark.parametrize(
    "argv, needle",
    [
        (("--material", "unobtainium", "--thickness-mm", "1", "--fmax-khz", "100"), "known materials: al-1100-o"),
        (("--material", "al-6061-t6", "--thickness-mm", "-1", "--fmax-khz", "100"), "--thickness-mm must be a positive"),
        (("--material", "al-6061-t6", "--thickness-mm", "1", "--fmax-khz", "0"), "--fmax-khz must be a positive"),
        (("--material", "al-6061-t6", "--thickness-mm", "nan", "--fmax-khz", "100"), "--thickness-mm must be a positive"),
        (("--material", "al-6061-t6", "--thickness-mm", "1", "--fmax-khz", "100", "--points", "1"), "--points must be"),
        (("--material", "al-6061-t6", "--thickness-mm", "1", "--fmax-khz", "100", "--temperature-c", "400"), "outside the validity range"),
    ],
)
def test_dispersion_bad_input_is_one_line_exit_2(tmp_path, argv, needle):
    rc, out, err = run_cli("dispersion", *argv, "--out", str(tmp_path / "x.csv"))
    assert rc == 2
    assert needle in err
    assert "Traceback" not in err
    assert not (tmp_path / "x.csv").exists()


@pytest.mark.parametrize("where", ["before", "after"])
def test_debug_is_accepted_before_and_after_the_subcommand(where, tmp_path):
    # --debug re-raises the library's own error instead of printing one line (the CLI contract
    # of this project's README; common practice for command-line tools, no source)
    argv = ["dispersion", "--material", "unobtainium", "--thickness-mm", "1", "--fmax-khz", "100",
            "--out", str(tmp_path / "x.csv")]
    argv = ["--debug", *argv] if where == "before" else [*argv, "--debug"]
    with pytest.raises(ValueError, match="known materials"):
        run_cli(*argv)


def test_no_progress_is_accepted_by_every_subcommand():
    import argparse

    from waneguide.cli.main import build_parser

    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    assert len(sub.choices) >= 8  # materials dispersion simulate features train score audit demo
    for name, p in sub.choices.items():
        flags = {s for a in p._actions for s in a.option_strings}
        assert {"--no-progress", "--debug"} <= flags, name


def test_closed_pipe_ends_quietly():
    # `waneguide materials --csv | head -1`: the reader closes the pipe early; the command must end
    # without a BrokenPipeError traceback (Python docs, signal module, "Note on SIGPIPE").
    import shutil
    import subprocess
    import sys

    exe = shutil.which("waneguide") or str(Path(sys.executable).with_name("waneguide"))
    proc = subprocess.run(f"'{exe}' materials --csv | head -1", shell=True, capture_output=True, text=True,
                          timeout=120)
    assert proc.stdout.startswith("name,youngs_modulus_pa")
    assert "Traceback" not in proc.stderr and "BrokenPipe" not in proc.stderr, proc.stderr
