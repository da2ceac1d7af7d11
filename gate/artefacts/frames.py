"""Which frame library summary.html hands great-tables: pandas (the default) or polars.

A separate, import-free module, so the `gate` command can choose polars at start-up without
loading the HTML writer (see ``gate.artefacts.html_summary`` for why the choice exists).
"""

from __future__ import annotations

from typing import Literal

Library = Literal["pandas", "polars"]
_CHOSEN: dict[str, Library] = {"library": "pandas"}


def frame_library() -> Library:
    return _CHOSEN["library"]


def use_polars_frames() -> None:
    """Build summary.html's tables from polars frames from now on in this process. Only for
    processes that will not fork after rendering (the `gate` command): polars' thread pool
    does not survive ``fork``."""
    _CHOSEN["library"] = "polars"
