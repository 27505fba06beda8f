"""Convention test: every import points down the data flow (DEVELOPERS.md, "Data flow").

Reads each module's imports from its syntax tree (nothing is executed) and
checks them against the layer table below. A new module lands in a folder;
a new folder needs a row here and in DEVELOPERS.md.
"""

from __future__ import annotations

import ast
import pathlib

import pytest

ROOT = pathlib.Path(__file__).resolve().parents[1]

# Layer of each box, and the boxes it may import (besides itself).
FOUNDATION = {"livefilt", "livefilt.errors", "livefilt.fields", "livefilt.units",
              "livefilt.progress", "livefilt.threads",
              "livefilt.safety"}
ALLOWED = {
    "foundation": set(),
    "dsp": {"foundation"},
    "acquire": {"foundation"},
    "drivers": {"foundation", "acquire", "runs"},
    "config": {"foundation", "dsp", "acquire"},
    "runs": {"foundation", "config", "dsp", "acquire"},
    "stream": {"foundation", "dsp", "acquire", "config", "runs"},
    "analysis": {"foundation", "dsp", "acquire", "config", "runs", "stream"},
    "window": {"foundation", "dsp", "acquire", "config", "runs", "stream", "analysis"},
    "front": {"foundation", "dsp", "acquire", "config", "runs", "stream", "analysis", "window",
              "drivers"},
}
QT = ("PySide6", "pyqtgraph", "shiboken6")


def box(module: str) -> str:
    if module in FOUNDATION:
        return "foundation"
    parts = module.split(".")
    if parts[0] != "livefilt":
        raise ValueError(module)
    second = parts[1] if len(parts) > 1 else ""
    if second in ("dsp", "acquire", "drivers", "runs", "stream", "analysis", "window"):
        return second
    if second == "config":
        return "config"
    if second in ("cli", "readout", "speed", "__main__"):
        return "front"
    raise AssertionError(f"{module}: not in the layer table of tests/test_layout.py")


def modules():
    for path in sorted((ROOT / "livefilt").rglob("*.py")):
        rel = path.relative_to(ROOT).with_suffix("")
        parts = list(rel.parts)
        if parts[-1] == "__init__":
            parts = parts[:-1]
        yield ".".join(parts), path
    for path in sorted((ROOT / "drivers").glob("*.py")):
        name = "livefilt.drivers" + ("" if path.stem == "__init__" else "." + path.stem)
        yield name, path


def imports(module: str, path: pathlib.Path):
    tree = ast.parse(path.read_text(), str(path))
    package = module if path.stem == "__init__" else module.rpartition(".")[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name, node.lineno
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")
                base = base[:len(base) - node.level + 1]
                name = ".".join(base + ([node.module] if node.module else []))
            else:
                name = node.module
            yield name, node.lineno
            # "from livefilt import dsp" names a box through the package
            if name == "livefilt":
                for a in node.names:
                    sub = ROOT / "livefilt" / a.name
                    if sub.is_dir() or sub.with_suffix(".py").exists():
                        yield f"livefilt.{a.name}", node.lineno


MODULES = list(modules())


def test_every_module_is_in_the_table():
    for name, _ in MODULES:
        box(name)


@pytest.mark.parametrize("name,path", MODULES, ids=[m for m, _ in MODULES])
def test_imports_point_down_the_flow(name, path):
    here = box(name)
    bad = []
    for target, line in imports(name, path):
        if target.split(".")[0] in QT and here != "window":
            bad.append(f"line {line}: {target} (only livefilt.window imports Qt)")
        if not target.startswith("livefilt"):
            continue
        if target == "livefilt":
            continue
        there = box(target)
        if there != here and there not in ALLOWED[here]:
            bad.append(f"line {line}: {target} ({here} may not import {there})")
    assert not bad, f"{path.relative_to(ROOT)}: " + "; ".join(bad)


def test_tests_mirror_the_folders():
    # every test file sits in the folder of the box it tests
    for path in (ROOT / "tests").rglob("test_*.py"):
        folder = path.parent.relative_to(ROOT / "tests").parts
        if folder:
            assert folder[0] in ALLOWED or folder[0] in ("drivers", "window", "analysis"), path
