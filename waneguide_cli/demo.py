"""The bundled demo (INVENTED scenario: the Lowmoor test rig, demo family FB-2)."""
from __future__ import annotations

from pathlib import Path

from waneguide_cli.main import CAUTION


def run_demo(out_dir: str | Path) -> dict[str, Path]:
    """Run the demo; returns the paths it wrote."""
    from features.curves_io import compute_dispersion_table, plot_dispersion, write_dispersion_csv
    from features.family import load_family

    out = Path(out_dir)
    out.mkdir(parents=True, exist_ok=True)
    family_path = Path(__file__).resolve().parent.parent / "configs" / "families" / "demo_fb2.toml"
    family = load_family(family_path)
    print(f"[1/1] dispersion curves for invented demo family {family.name} "
          f"({family.build_material().name}, {family.section.flange_thickness_mm} mm)")
    curves = compute_dispersion_table(family.build_material(), thickness_mm=family.section.flange_thickness_mm,
                                      fmax_khz=2000.0, points=800)
    paths = {
        "curves_csv": write_dispersion_csv(curves, out / "demo_curves.csv"),
        "curves_png": plot_dispersion(curves, out / "demo_curves.png"),
    }
    for key, p in paths.items():
        print(f"  {key}: {p}")
    print(CAUTION)
    return paths
