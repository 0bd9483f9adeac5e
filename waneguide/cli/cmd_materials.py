"""``waneguide materials``: list the built-in materials."""
from __future__ import annotations

import sys

ORDER = 10

MATERIAL_COLUMNS = ("name", "youngs_modulus_pa", "poisson_ratio", "density_kg_m3", "cl_m_s", "ct_m_s", "source")


def register(sub) -> None:
    p = sub.add_parser("materials", help="list the built-in materials")
    p.add_argument("--csv", action="store_true", help="print CSV with columns " + ", ".join(MATERIAL_COLUMNS))
    p.set_defaults(func=run)


def materials_table():
    """The built-in materials as a DataFrame with :data:`MATERIAL_COLUMNS`."""
    import pandas as pd

    from waneguide.features import BUILTIN_MATERIALS

    rows = [BUILTIN_MATERIALS[n].as_row() for n in sorted(BUILTIN_MATERIALS)]
    return pd.DataFrame(rows, columns=list(MATERIAL_COLUMNS))


def run(args) -> int:
    table = materials_table()
    if args.csv:
        table.to_csv(sys.stdout, index=False, lineterminator="\n")
        return 0
    view = table.assign(
        E_GPa=(table.youngs_modulus_pa / 1e9).round(1),
        rho=table.density_kg_m3.round(0),
        cL=table.cl_m_s.round(0),
        cT=table.ct_m_s.round(0),
    )[["name", "E_GPa", "poisson_ratio", "rho", "cL", "cT"]]
    print(view.to_string(index=False))
    print("\nsources: " + "; ".join(sorted(set(table.source))))
    return 0
