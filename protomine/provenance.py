"""Provenance: what produced an output file (config, seed, input fingerprints, code version).

HDF5 outputs carry these as root attributes; JSON/CSV-side outputs carry a ``provenance`` object (JSON)
or a sidecar ``<file>.provenance.json``.  ``protomine provenance FILE`` prints them.
"""
from __future__ import annotations

import hashlib
import json
import platform
from pathlib import Path
from typing import Annotated

import typer

from . import __version__
from .config import config_json
from .errors import InputError


def file_fingerprint(path: str | Path, *, chunk: int = 1 << 20) -> str:
    """sha256 of a file's bytes (hex, first 16 characters)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while b := fh.read(chunk):
            h.update(b)
    return h.hexdigest()[:16]


def folder_fingerprint(folder: str | Path) -> str:
    """sha256 over the relative names and bytes of every file below ``folder`` (sorted)."""
    h = hashlib.sha256()
    folder = Path(folder)
    for p in sorted(folder.rglob("*")):
        if p.is_file():
            h.update(str(p.relative_to(folder)).encode())
            h.update(file_fingerprint(p).encode())
    return h.hexdigest()[:16]


def provenance(cfg: dict, seed: int, inputs: dict[str, str] | None = None, command: str = "") -> dict:
    """The provenance record written into every output."""
    return {
        "producer": "protomine",
        "code_version": __version__,
        "python": platform.python_version(),
        "command": command,
        "seed": int(seed),
        "config": config_json(cfg),
        "inputs": json.dumps(inputs or {}, sort_keys=True),
    }


def read_provenance(path: str | Path) -> dict:
    path = Path(path)
    if not path.exists():
        raise InputError(path, None, "file not found")
    if path.suffix in (".h5", ".hdf5"):
        import h5py
        try:
            with h5py.File(path, "r") as f:
                return {k: (v.decode() if isinstance(v, bytes) else v.item() if hasattr(v, "item") else v) for k, v in f.attrs.items()}
        except OSError as e:
            raise InputError(path, None, f"not a readable HDF5 file ({e})") from None
    side = path.with_name(path.name + ".provenance.json")
    for cand in (side, path):
        if cand.suffix == ".json" and cand.is_file():
            try:
                doc = json.loads(cand.read_text())
            except json.JSONDecodeError as e:
                raise InputError(cand, None, f"not valid JSON ({e})") from None
            if isinstance(doc, dict) and ("provenance" in doc or "producer" in doc):
                return doc.get("provenance", doc)
    raise InputError(path, None, "no provenance recorded for this file (not written by protomine?)")


def provenance_cmd(file: Annotated[Path, typer.Argument(help="A file protomine wrote (store, library, report, labels...).")]) -> None:
    """Print the config, seed, input fingerprints and code version that produced FILE."""
    for k, v in read_provenance(file).items():
        if k in ("config", "inputs") and isinstance(v, str):
            try:
                v = json.dumps(json.loads(v), indent=1, sort_keys=True)
            except json.JSONDecodeError:
                pass
        typer.echo(f"{k}: {v}")


provenance_cmd.__name__ = "provenance"
