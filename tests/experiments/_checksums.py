"""sha256 of every file in a folder, to show that a command left a results folder unchanged.

Shared by the read-only tests of ``query``, ``compare`` and the input fuzz tests (and any later
command that only reads a results folder, such as a report).
"""

from __future__ import annotations

import hashlib
from pathlib import Path


def tree_checksums(folder) -> dict[str, str]:
    """Relative path -> sha256 hex digest of every file under ``folder``; folders as ``"dir"``.

    Hidden files (``.lock``, ``.tmp-*``) are included, so a left-over temporary file counts as a
    change; a folder's entry makes a new, empty folder count as one too.
    """
    root = Path(folder)
    out: dict[str, str] = {}
    for path in sorted(root.rglob("*")):
        rel = path.relative_to(root).as_posix()
        if path.is_dir() and not path.is_symlink():
            out[rel] = "dir"
        else:
            out[rel] = hashlib.sha256(path.read_bytes()).hexdigest()
    return out


def changes(before: dict[str, str], after: dict[str, str]) -> list[str]:
    """What differs between two :func:`tree_checksums` results (empty when nothing did)."""
    out = [f"added {p}" for p in sorted(after.keys() - before.keys())]
    out += [f"removed {p}" for p in sorted(before.keys() - after.keys())]
    out += [f"changed {p}" for p in sorted(before.keys() & after.keys()) if before[p] != after[p]]
    return out
