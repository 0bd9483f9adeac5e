"""CLI of the foundation: ``materials`` and ``dispersion`` driven in-process."""
from __future__ import annotations

import argparse
import io
import shutil
import subprocess
import sys
from contextlib import redirect_stderr, redirect_stdout
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from waneguide.cli.main import build_parser, main

# 6061-T6, ASM Handbook vol. 2 (1990), typical properties (from memory): E = 68.9 GPa, nu = 0.33,
# rho = 2700 kg/m3
E_6061, NU_6061, RHO_6061 = 68.9e9, 0.33, 2700.0
CT_6061 = np.sqrt(E_6061 / (2 * RHO_6061 * (1 + NU_6061)))                                 # 3097.3 m/s
CL_6061 = np.sqrt(E_6061 * (1 - NU_6061) / (RHO_6061 * (1 + NU_6061) * (1 - 2 * NU_6061)))  # 6148.9 m/s


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
    # the table carries the handbook values, printed in full (pandas writes floats with repr)
    assert (row.youngs_modulus_pa, row.poisson_ratio, row.density_kg_m3) == (E_6061, NU_6061, RHO_6061)
    # c_T = sqrt(E / (2 rho (1 + nu))), c_L = sqrt(E (1 - nu) / (rho (1 + nu) (1 - 2 nu))) (Graff 1975,
    # ch. 5); the table prints velocities rounded to 1 mm/s, so abs 5e-4 m/s, 6e-4 with float rounding
    assert row.ct_m_s == pytest.approx(CT_6061, abs=6e-4)
    assert row.cl_m_s == pytest.approx(CL_6061, abs=6e-4)


def test_dispersion_csv_columns_and_modes(tmp_path):
    out_csv = tmp_path / "curves.csv"
    png = tmp_path / "curves.png"
    rc, out, err = run_cli("dispersion", "--material", "al-6061-t6", "--thickness-mm", "1.0",
                           "--fmax-khz", "6000", "--points", "300", "--out", str(out_csv), "--plot", str(png))
    assert rc == 0, err
    table = pd.read_csv(out_csv)
    assert list(table.columns) == ["mode", "frequency_hz", "fd_mhz_mm", "phase_velocity_m_s",
                                   "group_velocity_m_s", "wavenumber_rad_m"]
    # Cut-off frequency-thickness products of a plate (Graff 1975 sec. 8.1): antisymmetric (2n - 1) cT/2
    # and n cL, symmetric n cT and (2n - 1) cL/2. With cT = 3.097 and cL = 6.149 MHz mm, below 6 MHz mm
    # lie A1 (1.549), A2 (4.646), S1/S2 (cL/2 = 3.074, cT = 3.097) and nothing else (next: cL = 6.149).
    # (S1b is the backward-wave branch of S1 below its cut-off, a naming of this code.)
    modes = set(table["mode"])
    assert {m for m in modes if m.startswith("A")} == {"A0", "A1", "A2"}
    assert {"S0", "S1", "S2"} <= modes and not any(m.startswith("S3") for m in modes)
    # each A mode starts within one frequency step above its cut-off (d = 1 mm; the 300-point grid step is
    # 20 kHz); the cut-off itself has zero group velocity, so it is not on the curve
    step = 6000e3 / 300
    first = table.groupby("mode")["frequency_hz"].min()
    for mode, cutoff in (("A1", CT_6061 / 2 / 1e-3), ("A2", 3 * CT_6061 / 2 / 1e-3)):
        assert cutoff <= first[mode] <= cutoff + step, (mode, first[mode], cutoff)
    # a real PNG (signature, ISO/IEC 15948 sec. 5.2) of more than 10 kB, more than an empty canvas (common
    # practice, no source)
    assert png.stat().st_size > 10_000 and png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # fd [MHz mm] = f [Hz] x 1 mm / 1e6; the CSV writes %.10g (5e-10 relative per value), so rtol 2e-9
    np.testing.assert_allclose(table.fd_mhz_mm, table.frequency_hz * 1e-3 * 1e-3, rtol=2e-9)


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
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    # the commands the README lists, each one present (more may come)
    assert {"materials", "dispersion", "simulate", "features", "train", "score", "audit", "demo"} <= set(sub.choices)
    for name, p in sub.choices.items():
        flags = {s for a in p._actions for s in a.option_strings}
        assert {"--no-progress", "--debug"} <= flags, name


def test_closed_pipe_ends_quietly():
    # `waneguide materials --csv | head -1`: the reader closes the pipe early; the command must end
    # without a BrokenPipeError traceback (Python docs, signal module, "Note on SIGPIPE").
    exe = shutil.which("waneguide") or str(Path(sys.executable).with_name("waneguide"))
    proc = subprocess.run(f"'{exe}' materials --csv | head -1", shell=True, capture_output=True, text=True,
                          timeout=120)
    assert proc.stdout.startswith("name,youngs_modulus_pa")
    assert "Traceback" not in proc.stderr and "BrokenPipe" not in proc.stderr, proc.stderr
