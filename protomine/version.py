"""The git commit the code runs from (the package version is ``protomine.__version__``).

This module imports nothing from the package, so ``setup.py`` loads it on its own at build time.
``code_commit()`` is, in a git checkout of protomine, ``<40-hex sha>`` with ``+dirty`` appended when tracked
files differ from that commit; in an installed wheel, the commit the wheel was built from (written into the
package as ``_build_commit.txt`` by ``setup.py`` at build time); otherwise ``"unknown"``.  Provenance records
both, so two libraries made by two builds of the same version can be told apart.
"""
from __future__ import annotations

import functools
import subprocess
from pathlib import Path

BUILD_COMMIT_FILE = "_build_commit.txt"

def git_commit(root: str | Path) -> str | None:
    """``<sha>`` or ``<sha>+dirty`` of the git checkout at ``root``; None when it is not one (or git is missing)."""
    root = Path(root)
    if not (root / ".git").exists():
        return None
    try:
        sha = subprocess.run(["git", "-C", str(root), "rev-parse", "HEAD"], capture_output=True, text=True,
                             timeout=10, check=True).stdout.strip()
        changed = subprocess.run(["git", "-C", str(root), "status", "--porcelain", "--untracked-files=no"],
                                 capture_output=True, text=True, timeout=10, check=True).stdout.strip()
    except (OSError, subprocess.SubprocessError):
        return None
    return f"{sha}+dirty" if changed else sha


@functools.lru_cache(maxsize=1)
def code_commit() -> str:
    package = Path(__file__).resolve().parent
    root = package.parent
    if (root / "pyproject.toml").is_file():  # running from protomine's own source tree (editable install)
        commit = git_commit(root)
        if commit:
            return commit
    built = package / BUILD_COMMIT_FILE
    if built.is_file():
        return built.read_text().strip() or "unknown"
    return "unknown"
