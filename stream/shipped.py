"""Where the shipped pipeline files are: the repo's ``configs/`` or the installed package data."""

from __future__ import annotations

from pathlib import Path

__all__ = ["DEFAULT_PIPELINE", "shipped_dir", "shipped_pipeline"]

#: The pipeline ``phasefree run`` runs when no file is named.
DEFAULT_PIPELINE = "default.toml"


def shipped_dir() -> Path:
    """The folder holding the shipped pipeline files.

    A source checkout (or editable install) uses the repository's ``configs/``; a regular
    install uses the copy packaged as ``stream.configs``.
    """
    here = Path(__file__).resolve().parent
    checkout = here.parent / "configs"
    if (checkout / DEFAULT_PIPELINE).is_file():
        return checkout
    return here / "configs"  # installed: package-data of ``stream.configs``


def shipped_pipeline(name: str = DEFAULT_PIPELINE) -> Path:
    """Path of a shipped pipeline file (``"loopback-ook.toml"`` or ``"loopback-ook"``)."""
    if not name.endswith(".toml"):
        name += ".toml"
    return shipped_dir() / name
