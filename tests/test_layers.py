"""The layers import downwards only (DEVELOPERS.md, "Rules of the layout").

``model`` imports nothing of the project; ``adapters`` imports ``model`` at most;
``monitor.site`` (the site file) imports nothing of ``monitor.analysis`` or
``monitor.app``; ``monitor.analysis`` (the engineer's analysis) nothing of
``monitor.app`` (the application around it). Imports under ``if TYPE_CHECKING`` count
too: a type that runs back up is a dependency all the same. The rule is this project's
own (common practice for layered code).
"""

from __future__ import annotations

import ast
from pathlib import Path

from tests.test_private_names import imported_from, module_name

ROOT = Path(__file__).resolve().parents[1]
PROJECT = ("model", "adapters", "monitor")
#: package → the project packages it may not import (prefixes)
FORBIDDEN: dict[str, tuple[str, ...]] = {
    "model": ("adapters", "monitor"),
    "adapters": ("monitor",),
    "monitor.site": ("monitor.analysis", "monitor.app"),
    "monitor.analysis": ("monitor.app",),
}


def _imports(path: Path, module: str) -> set[str]:
    """The project modules *path* (module *module*) imports, absolute, dotted."""
    out: set[str] = set()
    for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"), str(path))):
        if isinstance(node, ast.Import):
            out.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            source = imported_from(module, node, path.name == "__init__.py")
            out.add(source)
            out.update(f"{source}.{a.name}" for a in node.names)
    return {m for m in out if m.split(".")[0] in PROJECT}


def _inside(name: str, prefix: str) -> bool:
    return name == prefix or name.startswith(prefix + ".")


def breaches(paths: list[Path], root: Path = ROOT) -> list[str]:
    """"<module> imports <name>" for each import that runs up a layer."""
    found = []
    for path in paths:
        module = module_name(path, root)
        for layer, banned in FORBIDDEN.items():
            if not _inside(module, layer):
                continue
            for name in sorted(_imports(path, module)):
                if any(_inside(name, b) for b in banned):
                    found.append(f"{module} imports {name}")
    return found


def test_the_scan_sees_a_breach(tmp_path: Path) -> None:
    fake = tmp_path / "monitor" / "analysis" / "probe.py"
    fake.parent.mkdir(parents=True)
    fake.write_text("from ..app.jobs import analyze\nimport monitor.site.config\n",
                    encoding="utf-8")
    assert breaches([fake], tmp_path) == [
        "monitor.analysis.probe imports monitor.app.jobs",
        "monitor.analysis.probe imports monitor.app.jobs.analyze",
    ]


def test_every_layer_imports_downwards_only() -> None:
    paths = [p for package in PROJECT for p in sorted((ROOT / package).rglob("*.py"))]
    assert len(paths) > 90  # the scan read the tree
    assert breaches(paths) == []
