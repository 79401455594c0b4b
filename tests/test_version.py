"""Version, commit and packaged presets: what a regular install and provenance rely on."""
from __future__ import annotations

import subprocess
from pathlib import Path

from typer.testing import CliRunner

import protomine
from protomine.cli import app
from protomine.config import CONFIG_DIR, load_config
from protomine.provenance import provenance
from protomine.version import code_commit, git_commit

ROOT = Path(__file__).resolve().parents[1]


def test_version_option_prints_package_version_and_commit():
    r = CliRunner().invoke(app, ["--version"])
    assert r.exit_code == 0, r.output
    assert r.output.strip() == f"protomine {protomine.__version__} (commit {code_commit()})"


def test_commit_in_a_checkout_is_git_head_with_dirty_mark():
    # git itself is the outside reference for the commit and for what counts as a change
    head = subprocess.run(["git", "-C", str(ROOT), "rev-parse", "HEAD"], capture_output=True, text=True).stdout.strip()
    changed = subprocess.run(["git", "-C", str(ROOT), "status", "--porcelain", "--untracked-files=no"],
                             capture_output=True, text=True).stdout.strip()
    assert git_commit(ROOT) == (f"{head}+dirty" if changed else head)
    assert git_commit(ROOT / "tests") is None  # not the top of a checkout


def test_provenance_records_version_and_commit():
    prov = provenance(load_config("fast"), 3)
    assert prov["code_version"] == protomine.__version__ and prov["code_commit"] == code_commit()


def test_presets_ship_in_the_package_and_configs_links_to_them():
    assert CONFIG_DIR.parent == Path(protomine.__file__).resolve().parent
    assert {p.name for p in CONFIG_DIR.glob("*.toml")} >= {"default.toml", "fast.toml", "fine.toml", "stereo.toml"}
    top = ROOT / "configs"
    assert top.resolve() == CONFIG_DIR.resolve(), "configs/ must be the link to protomine/configs (one source of truth)"
    for name in ("fast", "fine"):
        assert load_config(name) != load_config(None)
    # the stereo preset states the edge test that is the default since one-sided support made it safe on gaussian depth
    stereo = load_config("stereo")["ingest"]
    assert stereo["line_support"] > 0 and stereo["line_support_one_sided"]
