"""Mutation check: break one thing the tests must guard, run the tests that should notice, report who did.

    python tools/mutate.py                       # every mutation, its relevant test files
    python tools/mutate.py pose-unaware -k twin  # one mutation; unknown options go to pytest
    python tools/mutate.py --baseline            # first run the same files on an unmutated copy
    python tools/mutate.py --json out.json       # also write the per-mutation result as JSON

Each mutation copies the package (protomine/ and demo_scenes/) to a temporary folder, appends a small
wrapper to one module that rebinds a function by name (so it survives rewrites of the function's body),
checks in a fresh interpreter that the mutated copy is the one imported and that the wrapper is in place,
then runs the mutation's test files with that copy first on the path (pytest runs from the temporary
folder, so the checkout's own package is never imported).  A target that is not found stops the script
with exit code 2: a mutation that silently applies to nothing would report a false "caught".

Exit code 0 when every mutation made at least one test fail, 1 when one survived, 2 on a setup error.
"""
from __future__ import annotations

import argparse
import json
import os
import re
import shutil
import subprocess
import sys
import tempfile
import xml.etree.ElementTree as ET
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("protomine", "demo_scenes")
MARK = "_MUTATION_APPLIED"
AUDIT_TESTS = ["tests/test_audit_metrics.py", "tests/test_audit_intervals.py", "tests/test_audit_report.py",
               "tests/test_audit_plan.py"]

# an argument replaced by name, whatever the function's other parameters are
_REPLACE_ARG = '''
import inspect as _mut_inspect


def _mut_replace_arg(fn, name, transform):
    sig = _mut_inspect.signature(fn)
    if name not in sig.parameters:
        raise RuntimeError(f"mutation: {fn.__name__} has no parameter {name!r}")

    def wrapper(*args, **kwargs):
        bound = sig.bind(*args, **kwargs)
        bound.arguments[name] = transform(bound.arguments[name])
        return fn(*bound.args, **bound.kwargs)
    return wrapper
'''


@dataclass
class Patch:
    """Append ``code`` to ``module`` (a path under the package copy); every name in ``targets`` must be
    defined at top level there (a ``def``, ``class`` or assignment)."""
    module: str
    targets: tuple[str, ...]
    code: str


@dataclass
class Mutation:
    name: str
    what: str
    patches: list[Patch]
    tests: list[str] = field(default_factory=list)


MUTATIONS = [
    Mutation(
        "pose-unaware",
        "the pose search only ever considers yaw shift 0 (every other shift scores inf), so the best shift is 0",
        [Patch("protomine/mine/posesearch.py", ("_distances_from_spectra",), '''
_mut_orig_distances = _distances_from_spectra


def _distances_from_spectra(*args, **kwargs):
    d = _mut_orig_distances(*args, **kwargs)   # (..., A): one distance per yaw shift
    d[..., 1:] = float("inf")
    return d
''')],
        ["tests/test_posesearch.py", "tests/test_posesearch_reference.py", "tests/test_engine.py",
         "tests/test_choosek.py", "tests/test_demo_quality.py"]),
    Mutation(
        "weights-ignored",
        "the pose search ignores the objects' observation weights (W = 1 in every distance)",
        [Patch("protomine/mine/posesearch.py", ("_spectra_of",), _REPLACE_ARG + '''
_spectra_of = _mut_replace_arg(_spectra_of, "w", np.ones_like)
''')],
        ["tests/test_posesearch.py", "tests/test_posesearch_reference.py", "tests/test_engine.py",
         "tests/test_label.py"]),
    Mutation(
        "scale-search-off",
        "the scale search is disabled: every candidate scale resamples the prototype at scale 1",
        [Patch("protomine/mine/posesearch.py", ("scale_prototypes",), _REPLACE_ARG + '''
scale_prototypes = _mut_replace_arg(scale_prototypes, "scales", lambda s: [1.0] * len(tuple(s)))
''')],
        ["tests/test_posesearch.py", "tests/test_posesearch_reference.py", "tests/test_engine.py"]),
    Mutation(
        "purity-interval-is-point",
        "the audit's overall purity interval (stratified, Fay-Feuer) returns the point estimate twice",
        [Patch("protomine/audit/uncertainty.py", ("stratified_purity",), '''
_mut_orig_stratified = stratified_purity


def stratified_purity(*args, **kwargs):
    est, _, _ = _mut_orig_stratified(*args, **kwargs)
    return est, est, est
''')],
        AUDIT_TESTS),
    Mutation(
        "cluster-interval-is-point",
        "the audit's per-cluster purity interval (Clopper-Pearson) returns the point estimate twice",
        [Patch("protomine/audit/uncertainty.py", ("clopper_pearson_interval",), '''
_mut_orig_clopper = clopper_pearson_interval


def clopper_pearson_interval(successes, n, *args, **kwargs):
    lo, hi = _mut_orig_clopper(successes, n, *args, **kwargs)     # validation, and (0, 1) for n = 0
    k, m = np.asarray(successes, dtype=np.float64), np.asarray(n, dtype=np.float64)
    p = np.where(m > 0, k / np.where(m > 0, m, 1.0), np.nan)
    lo, hi = np.where(m > 0, p, lo), np.where(m > 0, p, hi)
    return (float(lo), float(hi)) if lo.ndim == 0 else (lo, hi)
''')],
        AUDIT_TESTS),
    Mutation(
        "bootstrap-is-point",
        "the audit's bootstrap intervals (ARI, Hungarian accuracy) return the point estimate twice",
        [Patch("protomine/audit/uncertainty.py", ("bootstrap_intervals",), '''
_mut_orig_bootstrap = bootstrap_intervals


def bootstrap_intervals(clusters, labels, *args, **kwargs):
    from .metrics import clustering_scores
    out = _mut_orig_bootstrap(clusters, labels, *args, **kwargs)
    point = clustering_scores(clusters, labels)
    pair = lambda name: (point[name], point[name])  # noqa: E731
    return {name: {**v, "interval": pair(name), "reason": None} if isinstance(v, dict) else pair(name)
            for name, v in out.items()}
''')],
        AUDIT_TESTS),
]


def _defined(text: str, name: str) -> bool:
    return re.search(rf"^(?:def|class)\s+{re.escape(name)}\b|^{re.escape(name)}\s*[:=]", text, re.M) is not None


def _copy_package(dest: Path) -> None:
    for pkg in PACKAGES:
        shutil.copytree(ROOT / pkg, dest / pkg, ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))


def _apply(mutation: Mutation, dest: Path) -> None:
    for patch in mutation.patches:
        path = dest / patch.module
        if not path.is_file():
            raise SystemExit(f"error: mutation {mutation.name}: module {patch.module} not found")
        text = path.read_text()
        missing = [t for t in patch.targets if not _defined(text, t)]
        if missing:
            raise SystemExit(f"error: mutation {mutation.name}: {patch.module} defines no {', '.join(missing)} "
                             "(the code moved: update tools/mutate.py)")
        path.write_text(text + f"\n\n# --- mutation {mutation.name} (tools/mutate.py) ---\n{patch.code}\n{MARK} = True\n")


def _env() -> dict:
    env = dict(os.environ)
    env.pop("PYTHONPATH", None)
    env["PYTHONDONTWRITEBYTECODE"] = "1"
    return env


def _check_import(mutation: Mutation | None, dest: Path) -> None:
    """In a fresh interpreter started in ``dest``: the copy is imported, and every patched module is marked."""
    modules = [] if mutation is None else [p.module[:-3].replace("/", ".") for p in mutation.patches]
    code = ("import importlib, sys; import protomine; print(protomine.__file__)\n"
            f"for m in {modules!r}:\n"
            f"    assert getattr(importlib.import_module(m), {MARK!r}, False), m\n")
    r = subprocess.run([sys.executable, "-c", code], cwd=dest, env=_env(), capture_output=True, text=True)
    where = r.stdout.strip()
    if r.returncode != 0 or not where.startswith(str(dest)):
        raise SystemExit(f"error: the mutated copy in {dest} is not what Python imports "
                         f"(got {where or '-'}): {r.stderr.strip()[-2000:]}")


def _run_tests(dest: Path, files: list[str], extra: list[str]) -> tuple[list[str], int, int]:
    """Run ``files`` against the package in ``dest``: (failed test ids, number of tests, pytest exit code)."""
    report = dest / "junit.xml"
    guard = dest / "test_mutant_guard.py"     # inside pytest too, the copy is what gets imported
    guard.write_text(f"def test_mutant_guard():\n    import protomine\n"
                     f"    assert protomine.__file__.startswith({str(dest)!r}), protomine.__file__\n")
    cmd = [sys.executable, "-m", "pytest", str(guard), *[str(ROOT / f) for f in files], "-q", "-p", "no:cacheprovider",
           f"--rootdir={ROOT}", f"--junitxml={report}", *extra]
    r = subprocess.run(cmd, cwd=dest, env=_env(), capture_output=True, text=True)
    if not report.is_file():
        raise SystemExit(f"error: pytest wrote no report (exit {r.returncode}): {(r.stdout + r.stderr)[-3000:]}")
    failed, total = [], 0
    for case in ET.parse(report).getroot().iter("testcase"):
        bad = case.find("failure") is not None or case.find("error") is not None
        if case.get("name") == "test_mutant_guard":
            if bad:
                raise SystemExit(f"error: pytest did not import the mutated copy in {dest}")
            continue
        total += 1
        if bad:
            failed.append(f"{case.get('classname', '').replace('.', '/')}.py::{case.get('name')}")
    return failed, total, r.returncode


def run(mutation: Mutation | None, files: list[str], extra: list[str]) -> dict:
    with tempfile.TemporaryDirectory(prefix="protomine-mutant-") as d:
        dest = Path(d)
        _copy_package(dest)
        if mutation is not None:
            _apply(mutation, dest)
        _check_import(mutation, dest)
        failed, total, code = _run_tests(dest, files, extra)
    return {"mutation": mutation.name if mutation else "baseline", "what": mutation.what if mutation else "",
            "files": files, "tests": total, "failed": failed, "pytest_exit": code,
            "caught": bool(failed) if mutation else None}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("names", nargs="*", help=f"mutations to run (default all: {', '.join(m.name for m in MUTATIONS)})")
    ap.add_argument("--baseline", action="store_true", help="first run the same test files unmutated (they must pass)")
    ap.add_argument("--json", type=Path, help="write the results to this JSON file")
    args, extra = ap.parse_known_args(argv)
    known = {m.name: m for m in MUTATIONS}
    unknown = [n for n in args.names if n not in known]
    if unknown:
        ap.error(f"unknown mutation(s) {unknown}; known: {sorted(known)}")
    chosen = [known[n] for n in args.names] or MUTATIONS
    results = []
    if args.baseline:
        files = sorted({f for m in chosen for f in m.tests})
        base = run(None, files, extra)
        print(f"baseline: {base['tests']} tests, {len(base['failed'])} failed", flush=True)
        for t in base["failed"]:
            print(f"    {t}")
        results.append(base)
        if base["failed"]:
            print("error: the unmutated copy already fails; fix that first", file=sys.stderr)
            return 2
    for m in chosen:
        res = run(m, m.tests, extra)
        results.append(res)
        verdict = "CAUGHT" if res["caught"] else "SURVIVED"
        print(f"{m.name}: {verdict} by {len(res['failed'])} of {res['tests']} tests  ({m.what})", flush=True)
        for t in res["failed"]:
            print(f"    {t}")
    if args.json:
        args.json.write_text(json.dumps(results, indent=2))
    return 0 if all(r["caught"] for r in results if r["caught"] is not None) else 1


if __name__ == "__main__":
    sys.exit(main())
