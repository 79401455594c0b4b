"""Configuration: TOML presets, validated against the defaults.

``protomine/configs/default.toml`` (linked as ``configs/`` in a checkout) is the schema: every key that exists there may be set, with the same type;
anything else is an error that names the file and the key.  Numeric bounds live in ``BOUNDS``.
A preset (``fast``, ``fine``) or a user file is merged on top of the defaults.  The merged config is
recorded (as JSON) in every output file.
"""
from __future__ import annotations

import copy
import json
import tomllib
from importlib import resources
from pathlib import Path
from typing import Any

from .errors import InputError

# The presets ship inside the package (``protomine/configs``); the top-level ``configs`` folder of a checkout
# is a link to it, so there is one source of truth and an installed wheel finds its presets.
CONFIG_DIR = Path(str(resources.files("protomine") / "configs"))

# (min, max) inclusive bounds for numeric keys; lists are checked element-wise.
BOUNDS: dict[str, tuple[float, float]] = {
    "scenes.stereo_fraction": (0.0, 1.0),
    "ingest.plane_inlier_m": (1e-4, 0.1),
    "ingest.plane_confidence": (0.5, 0.999999),
    "ingest.plane_min_inlier_frac": (0.01, 1.0),
    "ingest.above_plane_m": (0.0, 0.1),
    "ingest.cluster_eps_m": (1e-3, 0.2),
    "ingest.cluster_min_points": (1, 10000),
    "ingest.concave_deg": (0.0, 180.0),
    "ingest.crop_size": (8, 512),
    "ingest.max_crops_per_object": (1, 64),
    "ingest.single_views_per_object": (0, 64),
    "volume.radial_bins": (2, 64),
    "volume.azimuth_bins": (8, 360),
    "volume.height_bins": (1, 64),
    "volume.radial_margin": (1.0, 3.0),
    "volume.height_margin": (1.0, 3.0),
    "volume.unread_min_surface": (0.0, 1.0),
    "volume.plane_band": (0.0, 10.0),
    "scenes.tumbled_fraction": (0.0, 1.0),
    "mine.clusters": (0, 100000),
    "mine.max_clusters": (1, 100000),
    "mine.scales": (0.25, 4.0),
    "mine.n_init": (1, 100),
    "mine.max_iter": (1, 10000),
    "mine.tol": (0.0, 1.0),
    "mine.chunk_size": (1, 1_000_000),
    "mine.free_weight": (0.0, 10.0),
    "mine.cluster_free_weight": (0.0, 10.0),
    "mine.colour_weight": (0.0, 10.0),
    "mine.symmetry_tol": (0.0, 1.0),
    "mine.symmetry_break_effect": (0.0, 10.0),
    "mine.symmetry_factor": (0.1, 100.0),
    "mine.unknown_alpha": (0.001, 0.5),
    "mine.tilt_nsides": (0, 16),
    "mine.score_margin_ring": (0.0, 1.0),
    "mine.tilt_refine_top": (1, 64),
    "mine.tilt_refine_margin": (0.0, 100.0),
    "mine.tilt_pass_levels": (0, 16),
    "mine.tilt_coarse_bins": (0, 1024),
    "mine.label_refine_top": (0, 64),
    "mine.view_prototype_members": (0, 100000),
    "mine.free_weight_factors": (0.0, 16.0),
    "mine.view_centre_offsets": (0.0, 2.0),
    "mine.view_cut_offsets": (0.0, 2.0),
    "mine.label_symmetric": (0, 64),
    "mine.unseen_charge": (0.0, 1.0),
    "mine.find_expand": (0, 1000),
    "mine.find_reciprocal": (0, 1_000_000),
    "mine.find_symmetric": (0, 1_000_000),
    "mine.find_prototype": (0.0, 1.0),
    "mine.find_prototype_weak": (0.0, 1.0),
    "mine.find_overrule": (0, 10),
    "mine.find_route_soft": (0, 1000),
    "mine.find_prototype_fuse": (0.0, 10.0),
    "mine.find_member_route": (0, 1_000_000),
    "mine.find_members_margin": (0.0, 10.0),
    "mine.find_rerank": (0, 1000),
    "mine.find_rerank_shortlist": (2, 1_000_000),
    "mine.find_rerank_weight": (0.0, 1.0),
    "mine.face_assign_updates": (0, 10),
    "audit.bootstrap": (10, 100000),
    "audit.match_radius_m": (1e-4, 10.0),
    "audit.target_interval_width": (0.01, 1.0),
    "audit.clean_purity": (0.5, 1.0),
    "audit.plan_random_share": (0.0, 1.0),
    "scale.workers": (0, 4096),
    "scale.batch_size": (0, 100_000_000),
    "scale.batch_steps": (1, 1_000_000),
}


def _load_toml(path: Path) -> dict:
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise InputError(path, None, "config file not found") from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as e:
        raise InputError(path, None, f"not valid TOML ({e})") from None


def defaults() -> dict:
    return _load_toml(CONFIG_DIR / "default.toml")


def resolve_config_path(name_or_path: str | Path) -> Path:
    p = Path(name_or_path)
    if p.suffix != ".toml" and not p.exists():
        preset = CONFIG_DIR / f"{name_or_path}.toml"
        if preset.is_file():
            return preset
        raise InputError(name_or_path, None, f"no such config file or preset (presets: {', '.join(sorted(q.stem for q in CONFIG_DIR.glob('*.toml')))})")
    return p


def _check(path: Path, base: dict, new: dict, prefix: str = "") -> None:
    for k, v in new.items():
        key = f"{prefix}{k}"
        if k not in base:
            raise InputError(path, key, f"unknown key (known: {', '.join(sorted(base))})")
        ref = base[k]
        if isinstance(ref, dict):
            if not isinstance(v, dict):
                raise InputError(path, key, f"expected a table, got {v!r}")
            _check(path, ref, v, key + ".")
            continue
        if isinstance(ref, bool) != isinstance(v, bool):
            raise InputError(path, key, f"expected {type(ref).__name__}, got {v!r}")
        if isinstance(ref, (int, float)) and not isinstance(ref, bool):
            if not isinstance(v, (int, float)) or (isinstance(ref, int) and not isinstance(ref, bool) and isinstance(v, float) and not float(v).is_integer()):
                raise InputError(path, key, f"expected {type(ref).__name__}, got {v!r}")
        elif isinstance(ref, list):
            if not isinstance(v, list) or not v or not all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v):
                raise InputError(path, key, f"expected a non-empty list of numbers, got {v!r}")
        elif isinstance(ref, str) and not isinstance(v, str):
            raise InputError(path, key, f"expected a string, got {v!r}")
        if key in BOUNDS:
            lo, hi = BOUNDS[key]
            for x in (v if isinstance(v, list) else [v]):
                if not (lo <= x <= hi):
                    raise InputError(path, key, f"value {x!r} out of range [{lo}, {hi}]")


def _merge(base: dict, new: dict) -> dict:
    out = copy.deepcopy(base)
    for k, v in new.items():
        out[k] = _merge(out[k], v) if isinstance(v, dict) else copy.deepcopy(v)
    return out


def load_config(name_or_path: str | Path | None = None, overrides: dict | None = None) -> dict:
    """Defaults merged with a preset/file and then with ``overrides`` (a nested dict)."""
    cfg = defaults()
    if name_or_path:
        path = resolve_config_path(name_or_path)
        new = _load_toml(path)
        _check(path, cfg, new)
        cfg = _merge(cfg, new)
    if overrides:
        _check(Path("<overrides>"), cfg, overrides)
        cfg = _merge(cfg, overrides)
    return cfg


def config_json(cfg: dict[str, Any]) -> str:
    """Canonical JSON of a config, as stored in output files."""
    return json.dumps(cfg, sort_keys=True)
