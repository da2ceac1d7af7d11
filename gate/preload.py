"""Import modules on a daemon thread while the main thread does GIL-free work (reading the
table, BLAS), so a later stage finds them loaded instead of paying for the import.

Python's per-module import lock makes this safe: a stage that imports a module the thread is
still loading waits for it to finish, and never sees it half-initialised. An import that fails
on the thread is ignored; the stage's own import then raises and reports it. Standard library
only, so the command can call it before anything heavy is loaded.
"""

from __future__ import annotations

import importlib
import sys
import threading


def preload_modules(*names: str, thread_name: str = "gate-preload") -> None:
    """Start importing ``names`` (in order) on one daemon thread, unless all are loaded."""
    wanted = [name for name in names if name not in sys.modules]
    if not wanted:
        return

    def run() -> None:
        for name in wanted:
            try:
                importlib.import_module(name)
            except Exception:  # noqa: BLE001, S112 - reported by the stage's own import
                continue

    threading.Thread(target=run, name=thread_name, daemon=True).start()
