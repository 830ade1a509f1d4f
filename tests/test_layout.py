"""The shape of the tree: one installed namespace, no import cycles, layers that point one way,
files a reader can hold in their head."""
from __future__ import annotations

import ast
import os
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import numpy as np
import pytest
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = {"geotween.models": ROOT / "models", "geotween.service": ROOT / "service"}
MAX_LINES = 450
SOURCE_SUFFIXES = {".py", ".js", ".css", ".html"}


def _modules() -> dict[str, Path]:
    out = {}
    for pkg, folder in PACKAGES.items():
        for path in folder.rglob("*.py"):
            rel = path.relative_to(folder).with_suffix("")
            parts = [p for p in rel.parts if p != "__init__"]
            out[".".join([pkg, *parts])] = path
    return out


def _imports(name: str, path: Path, known: set[str]) -> set[str]:
    """Project modules that `name` imports anywhere in its body (lazy imports too)."""
    is_pkg = path.name == "__init__.py"
    base = name.split(".") if is_pkg else name.split(".")[:-1]
    found = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            targets = [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            stem = node.module or ""
            if node.level:
                stem = ".".join(base[: len(base) - node.level + 1] + ([stem] if stem else []))
            targets = [f"{stem}.{a.name}" if f"{stem}.{a.name}" in known else stem for a in node.names]
        else:
            continue
        found.update(t for t in targets if t in known and t != name)
    return found


def import_graph() -> tuple[list[str], dict[str, set[str]]]:
    mods = _modules()
    names = sorted(mods)
    return names, {n: _imports(n, mods[n], set(names)) for n in names}


def test_import_graph_sees_known_edges():
    # guards the walker itself: a walker that found nothing would pass the cycle test vacuously
    _, edges = import_graph()
    assert "geotween.models.params" in edges["geotween.models.graph"]
    assert "geotween.models.engine" in edges["geotween.service.cache"]
    assert "geotween.service.routes.models" in edges["geotween.service.api"]


def test_no_import_cycles():
    names, edges = import_graph()
    index = {n: i for i, n in enumerate(names)}
    rows = [index[a] for a in names for b in edges[a]]
    cols = [index[b] for a in names for b in edges[a]]
    adjacency = csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(len(names), len(names)))
    # a cycle is a strongly connected component of more than one module (scipy.sparse.csgraph)
    n, labels = connected_components(adjacency, directed=True, connection="strong")
    cycles = [sorted(np.asarray(names)[labels == c]) for c in range(n) if np.sum(labels == c) > 1]
    assert not cycles, f"import cycles: {cycles}"


def test_models_never_import_service():
    _, edges = import_graph()
    crossing = {a: sorted(b for b in bs if b.startswith("geotween.service"))
                for a, bs in edges.items() if a.startswith("geotween.models")}
    assert not {a: b for a, b in crossing.items() if b}


def test_no_source_file_over_the_line_limit():
    long = []
    for top in ("models", "service", "tests", "bench"):
        for path in (ROOT / top).rglob("*"):
            if path.suffix in SOURCE_SUFFIXES and path.is_file():
                n = len(path.read_text().splitlines())
                if n > MAX_LINES:
                    long.append(f"{path.relative_to(ROOT)}: {n}")
    assert not long, f"files over {MAX_LINES} lines: {long}"


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    # built from a copy, so setuptools' build/ and egg-info folders never land in the checkout
    src, out = tmp_path_factory.mktemp("src"), tmp_path_factory.mktemp("wheel")
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, src / name)
    for name in ("models", "service"):
        shutil.copytree(ROOT / name, src / name, ignore=shutil.ignore_patterns("__pycache__"))
    subprocess.run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "-q",
                    "-w", str(out), str(src)], check=True, capture_output=True)
    return next(out.glob("geotween-*.whl"))


def test_wheel_holds_only_the_geotween_namespace(wheel):
    tops = {n.split("/")[0] for n in zipfile.ZipFile(wheel).namelist()}
    assert {t for t in tops if not t.endswith(".dist-info")} == {"geotween"}
    names = set(zipfile.ZipFile(wheel).namelist())
    assert "geotween/service/static/index.html" in names
    assert "geotween/service/routes/models.py" in names


def test_non_editable_install_into_a_fresh_venv(wheel, tmp_path):
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True)
    python = venv / "bin" / "python"
    subprocess.run([sys.executable, "-m", "pip", "--python", str(python), "install", "--no-deps", "-q",
                    str(wheel)], check=True, capture_output=True)
    # the dependencies (torch, numpy, fastapi...) come from this interpreter's site-packages, put on
    # PYTHONPATH so that its .pth files (the editable install of this checkout) are not processed
    deps = os.pathsep.join({sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]})
    probe = ("import importlib.util, sys, geotween.models.engine, geotween.service.api, geotween.service.cli;"
             "print(geotween.service.api.__file__);"
             "print(importlib.util.find_spec('models'), importlib.util.find_spec('service'))")
    done = subprocess.run([str(python), "-c", probe], cwd=tmp_path, capture_output=True, text=True,
                          env={**os.environ, "PYTHONPATH": deps})
    assert done.returncode == 0, done.stderr
    where, specs = done.stdout.splitlines()
    assert where.startswith(str(venv)), where
    assert specs == "None None"
    site = Path(subprocess.run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                               capture_output=True, text=True, check=True).stdout.strip())
    assert not (site / "models").exists() and not (site / "service").exists()
    assert (venv / "bin" / "geotween").is_file()
