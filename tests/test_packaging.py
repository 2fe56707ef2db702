"""Packaging: one ``tallywave`` import namespace, and no import cycles between modules.

The wheel is built from a copy of the project's own files and installed (without dependencies)
into a fresh virtual environment; from a neutral folder, ``tallywave.models`` must be found and
no top-level ``pipeline`` / ``models`` / ``flows`` / ``benchmarks`` package may exist.
"""

from __future__ import annotations

import ast
import json
import shutil
import subprocess
import sys
import venv
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = {"tallywave": ROOT / "tallywave", "tallywave.pipeline": ROOT / "pipeline",
            "tallywave.models": ROOT / "models", "tallywave.flows": ROOT / "flows"}


@pytest.mark.slow
def test_wheel_installs_one_namespace(tmp_path: Path) -> None:
    src = tmp_path / "src"
    src.mkdir()
    for name in ("pyproject.toml", "README.md"):
        shutil.copy(ROOT / name, src / name)
    for folder in ("tallywave", "pipeline", "models", "flows", "benchmarks"):
        shutil.copytree(ROOT / folder, src / folder,
                        ignore=shutil.ignore_patterns("__pycache__"))
    dist = tmp_path / "dist"
    build = subprocess.run(
        [sys.executable, "-m", "pip", "wheel", "--no-deps", "-q",
         "-w", str(dist), str(src)], capture_output=True, text=True, timeout=600, check=False)
    assert build.returncode == 0, build.stderr[-2000:]
    wheels = list(dist.glob("tallywave-*.whl"))
    assert len(wheels) == 1
    env = tmp_path / "env"
    venv.create(env, with_pip=False, system_site_packages=False)
    py = env / "bin" / "python"
    inst = subprocess.run(
        [sys.executable, "-m", "pip", "--python", str(py), "install", "--no-deps", "-q",
         str(wheels[0])], capture_output=True, text=True, timeout=600, check=False)
    assert inst.returncode == 0, inst.stderr[-2000:]
    neutral = tmp_path / "neutral"
    neutral.mkdir()
    probe = (
        "import importlib.util as u, json\n"
        "names = ['tallywave', 'tallywave.pipeline', 'tallywave.models', 'tallywave.flows',"
        " 'pipeline', 'models', 'flows', 'benchmarks']\n"
        "print(json.dumps({n: u.find_spec(n) is not None for n in names}))\n")
    got = subprocess.run([str(py), "-c", probe], cwd=neutral, capture_output=True, text=True,
                         timeout=120, check=False)
    assert got.returncode == 0, got.stderr
    found = json.loads(got.stdout)
    assert found == {"tallywave": True, "tallywave.pipeline": True, "tallywave.models": True,
                     "tallywave.flows": True, "pipeline": False, "models": False,
                     "flows": False, "benchmarks": False}
    # the console script points into the namespace
    script = (env / "bin" / "tallywave").read_text()
    assert "tallywave.pipeline.cli" in script


def _module_imports() -> dict[str, set[str]]:
    """Module-level (import-time) imports between tallywave modules, from the source files."""
    graph: dict[str, set[str]] = {}
    for pkg, folder in PACKAGES.items():
        for path in folder.glob("*.py"):
            name = pkg if path.stem == "__init__" else f"{pkg}.{path.stem}"
            deps: set[str] = set()
            tree = ast.parse(path.read_text(encoding="utf-8"))
            for node in tree.body:  # top level only: lazy imports inside functions are fine
                if isinstance(node, ast.ImportFrom) and node.module and \
                        node.module.startswith("tallywave"):
                    deps.add(node.module)
                    deps.update(f"{node.module}.{a.name}" for a in node.names)
                elif isinstance(node, ast.Import):
                    deps.update(a.name for a in node.names if a.name.startswith("tallywave"))
            graph[name] = deps
    return {k: {d for d in v if d in graph and d != k} for k, v in graph.items()}


def test_no_import_cycles_and_layers_respected() -> None:
    graph = _module_imports()
    assert "tallywave.pipeline.store" in graph
    # depth-first search for a cycle
    state: dict[str, int] = {}

    def visit(node: str, path: list[str]) -> None:
        state[node] = 1
        for dep in sorted(graph[node]):
            if state.get(dep) == 1:
                raise AssertionError("import cycle: " + " -> ".join([*path, node, dep]))
            if dep not in state:
                visit(dep, [*path, node])
        state[node] = 2

    for node in sorted(graph):
        if node not in state:
            visit(node, [])
    # the layers: models import no pipeline or flows; pipeline imports no flows
    for mod, deps in graph.items():
        if mod.startswith("tallywave.models"):
            assert not any(d.startswith(("tallywave.pipeline", "tallywave.flows")) for d in deps), mod
        if mod.startswith("tallywave.pipeline"):
            assert not any(d.startswith("tallywave.flows") for d in deps), mod
    # the store imports no stage
    stages = {"clean", "nowcast", "transmission", "forecast", "scoring", "ingest", "vintages",
              "report", "run"}
    assert not {f"tallywave.pipeline.{s}" for s in stages} & graph["tallywave.pipeline.store"]
