"""Figures the ``check`` and ``power`` commands save: where they go, and writing them."""

from __future__ import annotations

from pathlib import Path

from geoexp._paths import writing

CHECK_NAMES = ("design_check_probability.png", "design_check_balance.png", "design_check_flow.png")
POWER_NAME = "power_curve.png"


def check_figure_paths(folder: Path | None) -> dict[str, Path]:
    """The check's figure files in ``folder``, labelled for the output guard."""
    if folder is None:
        return {}
    return {f"--figures ({name})": folder / name for name in CHECK_NAMES}


def save_check_pictures(check, flow, folder: Path) -> list[Path]:
    """Write the design check's figures and print their paths."""
    from geoexp.cli._app import console
    from geoexp.report import save_check_figures

    with writing(folder, "figures folder"):
        paths = save_check_figures(check, flow, folder)
    console.print("Figures:")
    for path in paths:
        console.print(f"  {path}")
    return paths


def save_power_picture(curve, folder: Path) -> Path:
    """Write the power curve and print its path."""
    from geoexp.cli._app import console
    from geoexp.report import save_power_figure

    with writing(folder, "figures folder"):
        path = save_power_figure(curve, folder / POWER_NAME)
    console.print(f"Figure: {path}")
    return path
