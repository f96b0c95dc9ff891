"""Product modules use no private name of another product module.

A helper two modules need gets a public name (and a docstring) in the module that owns it;
``from X import _helper`` or ``X._helper`` across modules hides that dependency. Tests may
use the privates of the code they test, so only ``model/``, ``adapters/`` and ``monitor/``
are scanned. The rule is this project's own (common practice: PEP 8, "Public and internal
interfaces").
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = ("model", "adapters", "monitor")


def _private(name: str) -> bool:
    return name.startswith("_") and not name.startswith("__")


def module_name(path: Path, root: Path = ROOT) -> str:
    """The dotted name of the module at *path* under *root*."""
    parts = list(path.relative_to(root).with_suffix("").parts)
    return ".".join(parts[:-1] if parts[-1] == "__init__" else parts)


def imported_from(module: str, node: ast.ImportFrom, is_package: bool) -> str:
    """The absolute name of the module *node* (in *module*) imports from."""
    if not node.level:
        return node.module or ""
    base = module.split(".")
    base = base[: len(base) - node.level + (1 if is_package else 0)]
    return ".".join(base + ([node.module] if node.module else []))


def private_uses(path: Path, module: str | None = None) -> set[str]:
    """Dotted names of other product modules' privates that the module at *path* (named
    *module*, by default from its place in the tree) uses."""
    module = module or module_name(path)
    tree = ast.parse(path.read_text(encoding="utf-8"), str(path))
    uses: set[str] = set()
    modules: dict[str, str] = {}  # local name -> product module it stands for
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom):
            source = imported_from(module, node, path.name == "__init__.py")
            if source.split(".")[0] not in PACKAGES:
                continue
            for alias in node.names:
                if _private(alias.name) and source != module:
                    uses.add(f"{source}.{alias.name}")
                modules[alias.asname or alias.name] = f"{source}.{alias.name}"
        elif isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.split(".")[0] in PACKAGES:
                    local = alias.asname or alias.name.split(".")[0]
                    modules[local] = alias.name if alias.asname else local
    for node in ast.walk(tree):
        if not (isinstance(node, ast.Attribute) and _private(node.attr)):
            continue
        chain: list[str] = []
        value = node.value
        while isinstance(value, ast.Attribute):
            chain.append(value.attr)
            value = value.value
        if isinstance(value, ast.Name) and value.id in modules:
            target = ".".join([modules[value.id], *reversed(chain)])
            if target != module:
                uses.add(f"{target}.{node.attr}")
    return uses


def test_the_scan_sees_both_forms(tmp_path: Path) -> None:
    probe = tmp_path / "probe.py"
    probe.write_text(
        "from monitor.app.alarms import _event, judge_samples\n"
        "from .report import _head\n"
        "from ._own import _fine\n"  # monitor.app._own is not monitor.app.probe: counted
        "import monitor.app.report as r\n"
        "r._num, r.build_report\n",
        encoding="utf-8",
    )
    assert private_uses(probe, "monitor.app.probe") == {
        "monitor.app.alarms._event", "monitor.app.report._head", "monitor.app._own._fine",
        "monitor.app.report._num",
    }


def test_no_product_module_uses_another_modules_private_names() -> None:
    found = {
        (path.relative_to(ROOT).as_posix(), name)
        for package in PACKAGES
        for path in sorted((ROOT / package).rglob("*.py"))
        for name in private_uses(path)
    }
    assert sorted(found) == []
