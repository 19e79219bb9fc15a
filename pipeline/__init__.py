"""fairgauge: risk-adjusted, shrinkage-based unit reports published as a static site."""

__version__ = "0.1.0"

from pathlib import Path as _Path


def templates_path() -> _Path:
    """The templates folder: inside the installed package, or top-level in a source tree."""
    here = _Path(__file__).resolve().parent
    for candidate in (here / "templates", here.parent / "templates"):
        if (candidate / "qmd").is_dir():
            return candidate
    raise FileNotFoundError(
        f"fairgauge's templates folder is missing (looked in {here / 'templates'} and "
        f"{here.parent / 'templates'}); reinstall fairgauge."
    )
