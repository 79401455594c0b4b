"""protomine: mine pose-aware object prototypes from unlabelled RGB-D captures.

The pipeline, one sub-package per stage:

    scenes  -> demo captures (renderer of the built-in scenario)
    ingest  -> support plane, object proposals, object-centric cylindrical volumes, object store
    mine    -> pose search (FFT over yaw, discrete scales), clustering engine, prototype library
    label   -> single-view matching against the library, open-set decision, overlays
    audit   -> cluster purity and pose consistency against held-out labels, report
    curate  -> naming clusters, one-shot classes, export
"""
from __future__ import annotations

import os as _os

# torch's OpenMP threads wait for work passively instead of spinning (protomine.cores explains why); read
# once, when torch loads, so it is set here, before any stage imports torch
_os.environ.setdefault("OMP_WAIT_POLICY", "PASSIVE")
# torch's CPU tensors of 2 MB and more on transparent huge pages where the kernel offers them on request (madvise;
# numpy already asks for its own large arrays): the tilt search's blocks of tens of megabytes, mapped afresh, took a
# page fault every 4 KB (protomine.cores.large_blocks_mapped explains why they are mapped); read by torch at its
# first allocation, so set here too
_os.environ.setdefault("THP_MEM_ALLOC_ENABLE", "1")

# freed chunk-sized temporaries (up to 64 MB) stay in the heap for the next chunk instead of being unmapped
# and zero-filled again on first touch (protomine.cores.reuse_freed_memory; a no-op where this is not glibc)
from . import cores as _cores  # noqa: E402

_cores.reuse_freed_memory()

__version__ = "0.1.0"
