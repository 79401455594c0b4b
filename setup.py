"""Build hook: a wheel records the git commit it was built from (protomine/_build_commit.txt, read by
protomine.version.code_commit).  Everything else about the package is declared in pyproject.toml."""
import importlib.util
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py

HERE = Path(__file__).resolve().parent


def _version_module():
    spec = importlib.util.spec_from_file_location("_protomine_version", HERE / "protomine" / "version.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


class BuildPyWithCommit(build_py):
    def run(self):
        super().run()
        version = _version_module()
        target = Path(self.build_lib) / "protomine" / version.BUILD_COMMIT_FILE
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_text((version.git_commit(HERE) or "unknown") + "\n")


setup(cmdclass={"build_py": BuildPyWithCommit})
