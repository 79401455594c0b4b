"""Provenance: what produced an output file (config, seed, input fingerprints, code version and commit).

One rule for every output: HDF5 files (store, library) carry the record as root attributes; every other
file (CSV, JSON, PNG, HTML, ...) is listed in the one manifest of its folder, ``provenance.json``, written
by :func:`record_outputs` right after the files themselves:

    {"format": "protomine.manifest/1",
     "files": {"<file name>": {"fingerprint": "<sha256, 16 hex>", "command": ..., "seed": ..., "config": ...,
                               "inputs": ..., "code_version": ..., ...}, ...}}

Each entry holds the fingerprint of the file it describes, so an entry left over from another run (or a
file edited since) is detected, not trusted.  Several commands may write into one folder (mine, tag and
label beside a library): the manifest is updated under a lock, entries of files that no longer exist are
dropped.  ``protomine provenance FILE`` prints the record (older ``<file>.provenance.json`` sidecars and
JSON reports that embed a ``provenance`` object are still read).
"""
from __future__ import annotations

import hashlib
import json
import platform
from pathlib import Path
from typing import Annotated

import typer

from . import __version__
from .atomic import exclusive_lock, write_text
from .config import config_json
from .errors import InputError
from .version import code_commit


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
        "code_commit": code_commit(),
        "python": platform.python_version(),
        "command": command,
        "seed": int(seed),
        "config": config_json(cfg),
        "inputs": json.dumps(inputs or {}, sort_keys=True),
    }


MANIFEST = "provenance.json"
MANIFEST_FORMAT = "protomine.manifest/1"
SIDECAR_SUFFIX = ".provenance.json"     # older runs: one sidecar per file (still read)


def sidecar_path(path: str | Path) -> Path:
    path = Path(path)
    return path.with_name(path.name + SIDECAR_SUFFIX)


def manifest_path(path: str | Path) -> Path:
    """The manifest that describes output file ``path``: ``provenance.json`` in its folder."""
    return Path(path).parent / MANIFEST


PROVENANCE_KEYS = ("producer", "code_version", "code_commit", "python", "command", "seed", "config", "inputs")


def provenance_of(attrs: dict) -> dict:
    """The provenance record inside an HDF5 file's attributes (e.g. a library's), for files derived from it."""
    out = {}
    for k in PROVENANCE_KEYS:
        if k in attrs:
            v = attrs[k]
            out[k] = v.decode() if isinstance(v, bytes) else v.item() if hasattr(v, "item") else v
    return out


def _read_manifest(path: Path) -> dict:
    try:
        doc = json.loads(path.read_text())
    except FileNotFoundError:
        return {}
    except (json.JSONDecodeError, UnicodeDecodeError) as e:
        raise InputError(path, None, f"not valid JSON ({e})") from None
    if not (isinstance(doc, dict) and doc.get("format") == MANIFEST_FORMAT and isinstance(doc.get("files"), dict)):
        raise InputError(path, "format", f"expected a {MANIFEST_FORMAT!r} manifest")
    return doc["files"]


def record_outputs(paths: list[str | Path], prov: dict) -> list[Path]:
    """Record ``prov`` for the (already written) non-HDF5 outputs ``paths`` in their folders' manifests.

    Returns the manifests written (one per folder).
    """
    by_folder: dict[Path, list[Path]] = {}
    for p in paths:
        by_folder.setdefault(Path(p).parent, []).append(Path(p))
    out = []
    for folder, files in by_folder.items():
        man = folder / MANIFEST
        with exclusive_lock(man, timeout=30.0):
            entries = {n: e for n, e in _read_manifest(man).items() if (folder / n).is_file()}
            for f in files:
                entries[f.name] = {**prov, "fingerprint": file_fingerprint(f)}
                sidecar_path(f).unlink(missing_ok=True)     # a sidecar of an older run would disagree
            write_text(man, json.dumps({"format": MANIFEST_FORMAT, "files": dict(sorted(entries.items()))},
                                       indent=1, sort_keys=True))
        out.append(man)
    return out


def write_sidecar(path: str | Path, prov: dict) -> Path:
    """Record ``prov`` for one output file (in its folder's manifest; the name is kept for callers)."""
    return record_outputs([path], prov)[0]


def _is_hdf5(path: Path) -> bool:
    with open(path, "rb") as fh:
        return fh.read(8) == b"\x89HDF\r\n\x1a\n"


def read_provenance(path: str | Path) -> dict:
    """The provenance record of a file protomine wrote (HDF5 attributes, sidecar, or embedded in JSON)."""
    path = Path(path)
    if not path.is_file():
        raise InputError(path, None, "file not found")
    if _is_hdf5(path):
        import h5py
        try:
            with h5py.File(path, "r") as f:
                attrs = {k: (v.decode() if isinstance(v, bytes) else v.item() if hasattr(v, "item") and getattr(v, "size", 1) == 1 else v.tolist() if hasattr(v, "tolist") else v) for k, v in f.attrs.items()}
        except OSError as e:
            raise InputError(path, None, f"not a readable HDF5 file ({e})") from None
        if attrs.get("producer") != "protomine":
            raise InputError(path, "producer", "no provenance attributes (not written by protomine?)")
        return attrs
    if path.name == MANIFEST:
        raise InputError(path, None, "this is the folder's provenance manifest; ask about a file it lists")
    entry = _read_manifest(manifest_path(path)).get(path.name)
    if entry is not None:
        if entry.get("fingerprint") != file_fingerprint(path):
            raise InputError(manifest_path(path), f"files.{path.name}.fingerprint",
                             f"describes a different version of {path.name} (fingerprint {entry.get('fingerprint')}, "
                             f"file is {file_fingerprint(path)}); the file was changed after protomine wrote it")
        return entry
    side = sidecar_path(path)
    for cand in (side, path):
        if cand.suffix == ".json" and cand.is_file():
            try:
                doc = json.loads(cand.read_text())
            except (json.JSONDecodeError, UnicodeDecodeError) as e:
                raise InputError(cand, None, f"not valid JSON ({e})") from None
            if not (isinstance(doc, dict) and ("provenance" in doc or "producer" in doc)):
                continue
            if cand == side and doc.get("output_fingerprint") not in (None, file_fingerprint(path)):
                raise InputError(side, "output_fingerprint", f"sidecar describes a different version of {path.name} "
                                 f"(fingerprint {doc['output_fingerprint']}, file is {file_fingerprint(path)}); "
                                 "the file was changed after protomine wrote it")
            return doc.get("provenance", doc)
    raise InputError(path, None, f"no provenance recorded for this file (not listed in {MANIFEST}; "
                     "not written by protomine?)")


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
