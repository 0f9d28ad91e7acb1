"""The README's Python examples run as written, and ``pip install .`` installs one package.

* Every ```python block of README.md is executed, unchanged, in a fresh
  interpreter whose working folder holds what the README says it holds
  (``ranktide run`` with its built-in scenario has written ``ranktide-out/``).
  The embedding example's result is also checked against NetworkX's
  ``pagerank`` on the same three-node graph (outside reference).
* ``pip install --target`` of a clean copy of the repository puts only the
  package ``ranktide``, its dist-info and the ``ranktide`` script there, and
  ``from ranktide import Ranker, EventBatch, Engine`` works from a folder
  holding an empty ``solver/`` (which shadowed the old top-level modules).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import networkx as nx
import pytest

ROOT = Path(__file__).resolve().parent.parent
README = ROOT / "README.md"


def python_blocks(text: str) -> list[str]:
    """The bodies of the fenced ```python blocks, in order."""
    return re.findall(r"^```python\n(.*?)^```", text, flags=re.S | re.M)


def run_python(code: str, cwd: Path, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-c", code], cwd=cwd, capture_output=True, text=True,
                          timeout=600, env=env)


@pytest.fixture(scope="module")
def readme_folder(tmp_path_factory) -> Path:
    """A folder where ``ranktide run`` (the README's quick start) has written ``ranktide-out/``."""
    folder = tmp_path_factory.mktemp("readme")
    done = subprocess.run([sys.executable, "-m", "ranktide.stream.cli", "run", "--metrics", ""], cwd=folder,
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    assert (folder / "ranktide-out" / "snap-00000001" / "scores.parquet").is_file()
    return folder


def test_the_readme_has_python_examples() -> None:
    blocks = python_blocks(README.read_text(encoding="utf-8"))
    assert len(blocks) >= 2
    assert any("from ranktide import" in b for b in blocks)


@pytest.mark.parametrize("index", range(len(python_blocks(README.read_text(encoding="utf-8")))))
def test_readme_python_example_runs_as_written(index: int, readme_folder: Path) -> None:
    code = python_blocks(README.read_text(encoding="utf-8"))[index]
    done = run_python(code, readme_folder)
    assert done.returncode == 0, f"README python block {index + 1} failed:\n{code}\n{done.stderr[-3000:]}"


def test_embedding_example_agrees_with_networkx(tmp_path: Path) -> None:
    """The embedding example's global scores and per-node bounds, checked against NetworkX ``pagerank``."""
    code = next(b for b in python_blocks(README.read_text(encoding="utf-8")) if "from ranktide import" in b)
    probe = code + "\nimport json\ncert = ranker.certificate('global')\n" \
                   "print(json.dumps({'names': ranker.node_names().to_pylist(), 'scores': cert.scores.tolist(), " \
                   "'bounds': cert.bounds.tolist(), 'rtol': ranker.engine.rtol}))\n"
    done = run_python(probe, tmp_path)
    assert done.returncode == 0, done.stderr[-3000:]
    out = json.loads(done.stdout.strip().splitlines()[-1])
    g = nx.DiGraph()
    g.add_weighted_edges_from([("a", "b", 1.0), ("b", "c", 2.0), ("c", "a", 1.0)])
    expected = nx.pagerank(g, alpha=0.85, tol=1e-15)
    assert set(out["names"]) == set(expected)
    for name, score, bound in zip(out["names"], out["scores"], out["bounds"]):
        assert abs(score - expected[name]) <= bound + 1e-12, (name, score, bound)
        if out["rtol"]:
            assert bound <= out["rtol"] * score, (name, bound)


@pytest.fixture(scope="module")
def installed(tmp_path_factory) -> Path:
    """``pip install --no-deps --target T`` of a clean copy of the tracked files."""
    base = tmp_path_factory.mktemp("install")
    source = base / "source"
    listed = subprocess.run(["git", "ls-files", "-z"], cwd=ROOT, capture_output=True, check=True).stdout
    for rel in filter(None, listed.decode().split("\0")):
        if (ROOT / rel).is_file():
            (source / rel).parent.mkdir(parents=True, exist_ok=True)
            shutil.copy2(ROOT / rel, source / rel)
    target = base / "target"
    done = subprocess.run([sys.executable, "-m", "pip", "install", "--quiet", "--no-deps", "--disable-pip-version-check",
                           "--target", str(target), str(source)], capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    return target


def test_install_puts_only_ranktide_and_its_dist_info(installed: Path) -> None:
    entries = sorted(p.name for p in installed.iterdir())
    assert entries == ["bin", "ranktide", "ranktide-0.1.0.dist-info"], entries
    assert sorted(p.name for p in (installed / "bin").iterdir()) == ["ranktide"]
    top_level = installed / "ranktide-0.1.0.dist-info" / "top_level.txt"
    if top_level.exists():
        assert top_level.read_text().split() == ["ranktide"]
    package = installed / "ranktide"
    assert {p.name for p in package.iterdir() if p.is_dir() and p.name != "__pycache__"} == {
        "solver", "stream", "replay"}
    assert (package / "solver" / "kernels.py").is_file() and (package / "stream" / "cli.py").is_file()
    assert not (package / "tests").exists()


def test_installed_package_imports_from_a_folder_with_a_solver_folder(installed: Path, tmp_path: Path) -> None:
    (tmp_path / "solver").mkdir()  # an empty folder that shadowed the old top-level module
    (tmp_path / "stream").mkdir()
    env = {**os.environ, "PYTHONPATH": str(installed)}
    code = ("import ranktide, ranktide.stream.service, ranktide.replay.replay\n"
            "from ranktide import Ranker, EventBatch, Engine\n"
            "print(ranktide.__file__)\n")
    done = subprocess.run([sys.executable, "-c", code], cwd=tmp_path, capture_output=True, text=True,
                          timeout=300, env=env)
    assert done.returncode == 0, done.stderr[-3000:]
    assert Path(done.stdout.strip()).resolve() == (installed / "ranktide" / "__init__.py").resolve()
