"""The main job runs on the package's own dependencies: `pip install -e .` is enough for
`regional run`, and the test extra (pytest, statsmodels, dask, a linter...) is for the tests."""

from __future__ import annotations

import re
import subprocess
import sys
import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

BLOCKER = """
import importlib.abc, sys
BLOCKED = set(sys.argv[1].split(","))

class TestExtraBlocked(importlib.abc.MetaPathFinder):
    def find_spec(self, name, path, target=None):
        if name.split(".")[0] in BLOCKED:
            raise ModuleNotFoundError(f"No module named {name!r} (test extra, not installed)")
        return None

sys.meta_path.insert(0, TestExtraBlocked())
from regional.cli import main
sys.exit(main(["run", sys.argv[2], "--out", sys.argv[3], "--quiet"]))
"""


def _test_only_modules() -> set[str]:
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    names = lambda specs: {re.split(r"[<>=\[ ;]", s, maxsplit=1)[0].lower() for s in specs}  # noqa: E731
    return names(project["optional-dependencies"]["test"]) - names(project["dependencies"])


def test_readme_main_command_installs_only_the_package():
    readme = (ROOT / "README.md").read_text()
    assert "pip install -e . && regional run demo_region" in readme
    assert 'pip install -e ".[test]" && python -m pytest -q' in readme
    ci = (ROOT / ".ci" / "run").read_text()
    assert 'pip install --quiet -e ".[test]"' in ci and "python -m pytest -q" in ci


def test_main_job_runs_without_the_test_extra(tmp_path):
    blocked = _test_only_modules()
    assert {"pytest", "statsmodels", "dask", "distributed", "ruff"} <= blocked
    done = subprocess.run(
        [
            sys.executable,
            "-c",
            BLOCKER,
            ",".join(sorted(blocked)),
            str(ROOT / "demo_region"),
            str(tmp_path / "results"),
        ],
        capture_output=True,
        text=True,
        cwd=tmp_path,
        env={"PYTHONPATH": str(ROOT), "MPLBACKEND": "Agg", "PATH": "/usr/bin:/bin"},
        timeout=600,
    )
    assert done.returncode == 0, done.stderr[-2000:]
    assert (tmp_path / "results" / "report.html").is_file()


def test_distribution_name_is_not_the_unrelated_project_on_the_index():
    # The package index holds an unrelated project called "regional" (issue 15): the
    # distribution is named "regional-flows"; the import package and the command stay regional.
    project = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]
    assert project["name"] == "regional-flows"
    assert project["scripts"] == {"regional": "regional.cli:command_line"}
    readme = (ROOT / "README.md").read_text()
    assert "`regional-flows`" in readme and "pip install -e ." in readme
