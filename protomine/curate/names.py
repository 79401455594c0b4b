"""Naming clusters: a name per prototype, stored in the library with the example it came from.

Conventions: a cluster is a prototype index k in [0, K).  ``prototypes/name`` holds the name ("" when
unnamed) and ``prototypes/name_example`` the object id the name was given from ("" when the cluster was
named directly by its index).  Names are free text (one line, at most ``MAX_NAME`` characters); two
clusters may share a name (one item class split over two prototypes), and exports then merge them into
one category.  Every change rewrites the library atomically (temporary file + rename, writer lock) and
re-renders ``gallery.png`` beside the library when that folder has one.
"""
from __future__ import annotations

from pathlib import Path

import numpy as np

from ..errors import InputError
from ..mine.library import Library, read_library, write_library

MAX_NAME = 80


def check_name(name: str | None, *, field: str = "--name") -> str:
    """The cleaned name (surrounding spaces removed); InputError for an empty or multi-line name."""
    if name is None or not str(name).strip():
        raise InputError(None, field, f"expected a non-empty name, got {name!r} (use --clear to remove a name)")
    name = str(name).strip()
    if any(c in name for c in "\r\n\t") or len(name) > MAX_NAME:
        raise InputError(None, field, f"expected one line of at most {MAX_NAME} characters without tabs, got {name!r}")
    return name


def cluster_of(lib: Library, object_id: str) -> int:
    """The cluster holding ``object_id`` (InputError naming the library when it is not a member)."""
    return int(lib.members["cluster"][lib.member_index(object_id)])


def name_cluster(library_path: str | Path, *, name: str | None, object_id: str | None = None,
                 cluster: int | None = None, clear: bool = False) -> Library:
    """Name (or with ``clear`` un-name) the cluster holding ``object_id``, or cluster ``cluster``.

    Exactly one of ``object_id`` / ``cluster``.  Returns the rewritten library.
    """
    library_path = Path(library_path)
    if (object_id is None) == (cluster is None):
        raise InputError(library_path, "--object/--cluster", "give exactly one of an object id or a cluster index")
    if clear and name is not None:
        raise InputError(None, "--name", "give either a name or --clear, not both")
    name = "" if clear else check_name(name)
    lib = read_library(library_path)
    if object_id is not None:
        k = cluster_of(lib, str(object_id))
    else:
        k = int(cluster)
        if not 0 <= k < lib.n_clusters:
            raise InputError(library_path, "prototypes", f"no cluster {k}; the library has clusters 0..{lib.n_clusters - 1}")
    return _set_name(lib, library_path, k, name, "" if clear or object_id is None else str(object_id))


def name_clusters(library_path: str | Path, named: list[tuple[str, str]], *, pictures: bool = True) -> Library:
    """Name several clusters, each from one of its members: ``named`` is [(object id, name), ...].  The same
    library, member sheets and gallery as :func:`name_cluster` called for each pair in turn (a later pair for
    the same cluster wins), with one rewrite of the library and one gallery instead of one per name (the
    gallery alone is ~1.3 s of CPU for 8 prototypes).  Returns the rewritten library.  ``pictures`` False: the
    library only; the caller redraws the gallery and the named clusters' sheets (:func:`refresh_gallery`), e.g.
    on another core while it goes on (the demo)."""
    library_path = Path(library_path)
    lib = read_library(library_path)
    changes = [(cluster_of(lib, str(oid)), check_name(name), str(oid)) for oid, name in named]
    if not changes:
        return lib
    return _set_names(lib, library_path, changes, pictures=pictures)


def _set_name(lib: Library, path: Path, k: int, name: str, example: str) -> Library:
    return _set_names(lib, path, [(k, name, example)])


def _set_names(lib: Library, path: Path, changes: list[tuple[int, str, str]], pictures: bool = True) -> Library:
    names = np.array([str(x) for x in lib.prototypes["name"]], dtype=object)
    examples = np.array([str(x) for x in lib.prototypes["name_example"]], dtype=object)
    for k, name, example in changes:
        names[k], examples[k] = name, example
    lib.prototypes["name"], lib.prototypes["name_example"] = names, examples
    write_library(path, lib)
    if pictures:
        refresh_gallery(lib, path, clusters=sorted({k for k, _, _ in changes}))
    return lib


def refresh_gallery(lib: Library, library_path: str | Path, clusters: list[int] | None = None) -> Path | None:
    """Re-render gallery.png (and the member sheets of ``clusters``, None = all: their titles carry the
    names) beside the library if that folder already has them; returns the gallery's path."""
    from ..mine.gallery import render_gallery
    refresh_member_sheets(lib, library_path, clusters)
    gallery = Path(library_path).parent / "gallery.png"
    if not gallery.is_file():
        return None
    from ..provenance import provenance_of, record_outputs
    p = lib.prototypes
    from ..mine.pipeline import library_gallery_faces
    render_gallery(gallery, np.asarray(p["volumes"]), counts=np.asarray(p["count"]),
                   symmetry=np.asarray(p["symmetry"]), names=[str(x) for x in p["name"]], faces=library_gallery_faces(lib))
    record_outputs([gallery], provenance_of(lib.attrs))
    return gallery


def refresh_member_sheets(lib: Library, library_path: str | Path, clusters: list[int] | None = None) -> list[Path]:
    """Re-render members/ beside the library when it exists and the library's store can still be opened."""
    from ..ingest.sharded import open_store
    from ..mine.members import write_member_sheets
    folder = Path(library_path).parent / "members"
    store = Path(lib.store_path) if lib.store_path else None
    if not folder.is_dir() or store is None or not store.is_file():
        return []
    return write_member_sheets(folder, lib, open_store(store), clusters=clusters)
