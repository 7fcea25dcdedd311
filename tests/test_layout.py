"""The layout of the house is a contract: the import rules of DEVELOPERS.md
("Architecture") are checked by import-linter (the contracts live in pyproject.toml),
and the import graph of grimp (import-linter's own engine) has no circle.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import grimp
import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("daemon", "drivers", "sim_instrument")


def _lint_imports(root: Path) -> subprocess.CompletedProcess:
    # The tree at ``root`` first on the path, so a copy is checked, not the installed one.
    env = {**os.environ, "PYTHONPATH": str(root)}
    return subprocess.run([sys.executable, "-c",
                           "import sys; from importlinter.cli import lint_imports_command; "
                           "sys.exit(lint_imports_command())", "--no-cache"],
                          cwd=root, env=env, capture_output=True, text=True, timeout=300)


def test_the_import_contracts_are_kept():
    r = _lint_imports(ROOT)
    assert r.returncode == 0, r.stdout + r.stderr
    assert "0 broken" in r.stdout


@pytest.fixture
def tree_copy(tmp_path):
    for name in PACKAGES:
        shutil.copytree(ROOT / name, tmp_path / name,
                        ignore=shutil.ignore_patterns("__pycache__"))
    shutil.copy(ROOT / "pyproject.toml", tmp_path / "pyproject.toml")
    return tmp_path


@pytest.mark.parametrize(("module", "line", "contract"), [
    ("daemon/science/langley.py", "from daemon.store import writer",
     "daemon rooms: commands > station > store > science > config"),
    ("daemon/store/reader.py", "from daemon.station import clock",
     "daemon rooms: commands > station > store > science > config"),
    ("drivers/transport.py", "import daemon.config.settings",
     "drivers import nothing of daemon or sim_instrument"),
    ("sim_instrument/sky.py", "from drivers import transport",
     "sim_instrument takes only the codec and the interface types from drivers"),
    ("daemon/commands/status.py", "import sqlite_utils",
     "the read path stays light"),
])
def test_an_import_against_the_rules_breaks_a_contract(tree_copy, module, line, contract):
    path = tree_copy / module
    path.write_text(path.read_text() + f"\n{line}  # added by the test\n")
    r = _lint_imports(tree_copy)
    assert r.returncode == 1, r.stdout + r.stderr
    broken = [ln for ln in r.stdout.splitlines() if ln.endswith("BROKEN")]
    assert any(ln.startswith(contract) for ln in broken), r.stdout


def _circles() -> list[tuple[str, str]]:
    graph = grimp.build_graph(*PACKAGES, cache_dir=None)
    found = []
    for importer in sorted(graph.modules):
        for imported in sorted(graph.find_modules_directly_imported_by(importer)):
            if graph.chain_exists(importer=imported, imported=importer):
                found.append((importer, imported))
    return found


def test_no_module_takes_part_in_an_import_circle():
    # Package __init__ files import nothing here, so every pair is two real modules.
    assert _circles() == []


def test_a_circle_is_found_when_someone_adds_one(tree_copy):
    # sessionfit imports screening; the line below closes the loop.
    path = tree_copy / "daemon/science/screening.py"
    path.write_text(path.read_text() + "\nfrom daemon.science import sessionfit  # noqa\n")
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([str(tree_copy), str(ROOT)])}
    r = subprocess.run([sys.executable, "-c", "import tests.test_layout as t; print(t._circles())"],
                       cwd=tree_copy, env=env, capture_output=True, text=True, timeout=300)
    assert r.returncode == 0, r.stderr
    assert "('daemon.science.screening', 'daemon.science.sessionfit')" in r.stdout
