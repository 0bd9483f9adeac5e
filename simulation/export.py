"""Export simulated cases as capture files, so that the whole pipeline can run on files.

Each exported case gives one capture file ``<case_id>.<fmt>``; each specimen's
pristine baseline is written once as ``<specimen_id>_baseline.<fmt>`` (all
states of a specimen share it). ``index.csv`` lists, per case, the capture file,
its baseline file and the ground truth and confounders from the campaign table.
Files go through :func:`waneguide.features.io.write_capture` (atomic; format from the
suffix: csv, mat, h5, hdf5, npz).

Exported captures carry the metadata of the campaign: ``path_id`` is the
specimen (one transducer pair per specimen), ``temperature_c`` the capture or
baseline temperature, plus the extra keys ``simulated``, ``role``, ``case_id``,
``specimen_id``, ``campaign_fingerprint``, ``family`` and ``family_fingerprint``.
"""
from __future__ import annotations

from pathlib import Path
from typing import Iterable

import pandas as pd

from waneguide.core.atomic import atomic_write_text
from waneguide.core.errors import InputError
from waneguide.features.io import write_capture
from waneguide.simulation.campaign import load_campaign

__all__ = ["export_campaign_captures", "EXPORT_FORMATS"]

EXPORT_FORMATS = ("csv", "mat", "h5", "hdf5", "npz")
_INDEX_COLUMNS = ("case_id", "specimen_id", "file", "baseline_file", "max_loss_pct", "max_loss_mm", "mean_loss_pct",
                  "lost_area_mm2", "patch_count", "extent_mm", "temperature_c", "baseline_temperature_c", "snr_db")


def export_campaign_captures(campaign_dir: str | Path, out_dir: str | Path, *, cases: Iterable | None = None,
                             fmt: str = "csv") -> pd.DataFrame:
    """Write cases of a finished campaign as capture files with their baselines.

    Parameters
    ----------
    campaign_dir : path
        A finished campaign (:func:`waneguide.simulation.campaign.run_campaign`).
    out_dir : path
        Destination folder (created). Existing files of the same names are
        refused rather than overwritten.
    cases : iterable of int or str, optional
        Row positions or ``case_id`` values; default every case.
    fmt : str
        One of :data:`EXPORT_FORMATS`.

    Returns
    -------
    DataFrame
        The index written to ``out_dir/index.csv`` (file names relative to ``out_dir``).
    """
    fmt = str(fmt).lower().lstrip(".")
    if fmt not in EXPORT_FORMATS:
        raise InputError(f"fmt must be one of {', '.join(EXPORT_FORMATS)}; got {fmt!r}.")
    camp = load_campaign(campaign_dir)
    table = camp.cases
    if cases is None:
        positions = list(range(len(table)))
    else:
        by_id = {cid: i for i, cid in enumerate(table["case_id"])}
        positions = []
        for c in cases:
            if isinstance(c, str):
                if c not in by_id:
                    raise InputError(f"case_id {c!r} is not in campaign {campaign_dir}.")
                positions.append(by_id[c])
            else:
                i = int(c)
                if not 0 <= i < len(table):
                    raise InputError(f"case index {i} is outside campaign {campaign_dir} (0 to {len(table) - 1}).")
                positions.append(i)
    positions = list(dict.fromkeys(positions))  # drop repeats, keep the order asked for
    order = {pos: k for k, pos in enumerate(positions)}
    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    index_path = out / "index.csv"
    planned = {out / f"{table['case_id'].iloc[i]}.{fmt}" for i in positions}
    planned |= {out / f"{table['specimen_id'].iloc[i]}_baseline.{fmt}" for i in positions}
    clash = sorted(str(p) for p in planned | {index_path} if p.exists())
    if clash:
        raise InputError(f"{len(clash)} file(s) already exist in {out} (first: {clash[0]}); nothing was overwritten. "
                         "Export into an empty folder.")
    rows = []
    written_baselines: set[str] = set()
    for i in sorted(positions, key=lambda i: (int(table["chunk"].iloc[i]), i)):  # chunk order: one load each
        row = table.iloc[i]
        cap_name = f"{row['case_id']}.{fmt}"
        base_name = f"{row['specimen_id']}_baseline.{fmt}"
        write_capture(camp.capture(i), out / cap_name)
        if base_name not in written_baselines:
            write_capture(camp.baseline(i), out / base_name)
            written_baselines.add(base_name)
        rows.append({**{c: row[c] for c in _INDEX_COLUMNS if c in row.index}, "file": cap_name,
                     "baseline_file": base_name, "_order": order[i]})
    index = pd.DataFrame(rows).sort_values("_order").drop(columns="_order").reset_index(drop=True)
    index = index[[c for c in _INDEX_COLUMNS if c in index.columns]]
    atomic_write_text(index_path, index.to_csv(index=False))
    return index
