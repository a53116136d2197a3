"""Dependencies run one way: the daemon builds on drivers/, never the reverse, and the daemon
reaches the simulator only through the registry and the ground-truth interface.

Every import is found from the source (ast): top-level ones, ones inside functions or
under ``if TYPE_CHECKING:``, relative ones, and ``importlib.import_module("...")`` /
``__import__("...")`` calls with a literal name.
"""

from __future__ import annotations

import ast
from collections.abc import Iterator
from pathlib import Path

import pytest

from drivers import registry

ROOT = Path(__file__).resolve().parent.parent


def module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _resolve(current: str, is_package: bool, level: int, module: str | None) -> str:
    """The absolute name of ``from <level dots><module> import ...`` inside ``current``."""
    if level == 0:
        return module or ""
    base = current.split(".")
    if not is_package:
        base.pop()
    if level > 1:
        base = base[: len(base) - (level - 1)]
    return ".".join(base + ([module] if module else []))


def imported_modules(source: str, current: str = "", *, is_package: bool = False) -> Iterator[tuple[int, str]]:
    """(line, module) for every import in ``source``; ``from a import b`` yields a and a.b."""
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            for alias in node.names:
                yield node.lineno, alias.name
        elif isinstance(node, ast.ImportFrom):
            base = _resolve(current, is_package, node.level, node.module)
            yield node.lineno, base
            for alias in node.names:
                yield node.lineno, f"{base}.{alias.name}" if base else alias.name
        elif isinstance(node, ast.Call) and node.args:
            func = node.func
            name = func.attr if isinstance(func, ast.Attribute) else func.id if isinstance(func, ast.Name) else ""
            first = node.args[0]
            if name in ("import_module", "__import__") and isinstance(first, ast.Constant) and isinstance(first.value, str):
                yield node.lineno, first.value


def is_within(module: str, package: str) -> bool:
    return module == package or module.startswith(package + ".")


def violations(folder: str, forbidden: str) -> list[str]:
    found = []
    for path in sorted((ROOT / folder).rglob("*.py")):
        current = module_name(path)
        for line, module in imported_modules(path.read_text(encoding="utf-8"), current, is_package=path.name == "__init__.py"):
            if is_within(module, forbidden):
                found.append(f"{path.relative_to(ROOT)}:{line} imports {module}")
    return sorted(set(found))


def test_drivers_never_import_the_daemon() -> None:
    assert violations("drivers", "daemon") == []


def test_the_daemon_never_imports_simulator_internals() -> None:
    assert violations("daemon", "drivers.sim") == []


FRONT_ENDS = ("daemon.web", "daemon.commands", "daemon.cli", "daemon.mqtt")


def test_the_service_and_the_domain_never_import_a_front_end() -> None:
    """daemon/station.py and everything it builds on serve every front end: the web package
    and the command line call them, never the reverse."""
    found = []
    for path in sorted((ROOT / "daemon").rglob("*.py")):
        current = module_name(path)
        if any(is_within(current, front) for front in FRONT_ENDS):
            continue
        for line, module in imported_modules(path.read_text(encoding="utf-8"), current, is_package=path.name == "__init__.py"):
            if any(is_within(module, front) for front in FRONT_ENDS):
                found.append(f"{path.relative_to(ROOT)}:{line} imports {module}")
    assert found == []


def test_the_registry_tables_name_driver_modules_only() -> None:
    # The registry imports by a name from these tables, which the ast walk cannot follow.
    for table in (registry.CAMERA_MODULES, registry.STAGE_MODULES):
        for module in table.values():
            assert is_within(module, "drivers") and not is_within(module, "daemon"), module


@pytest.mark.parametrize(
    ("source", "current", "expected"),
    [
        ("from daemon.profile import Profile\n", "drivers.x", "daemon.profile"),
        ("import daemon.config as c\n", "drivers.x", "daemon.config"),
        ("def f():\n    from daemon import vessels\n", "drivers.x", "daemon.vessels"),
        ("from typing import TYPE_CHECKING\nif TYPE_CHECKING:\n    from daemon.scope import Scope\n", "drivers.x", "daemon.scope"),
        ("import importlib\nm = importlib.import_module('daemon.hardware')\n", "drivers.x", "daemon.hardware"),
        ("m = __import__('daemon')\n", "drivers.x", "daemon"),
        ("from .. import sim\n", "daemon.commands.capture", "daemon.sim"),
        ("from ..sim.world import SimWorld\n", "drivers.sim.camera", "drivers.sim.world"),
        ("from drivers import sim\n", "daemon.scope", "drivers.sim"),
    ],
)
def test_the_walk_finds_every_kind_of_import(source: str, current: str, expected: str) -> None:
    assert expected in {m for _, m in imported_modules(source, current)}


def test_the_walk_does_not_mistake_lookalikes() -> None:
    found = {m for _, m in imported_modules("import daemonize\nfrom drivers import simple\n", "x")}
    assert not any(is_within(m, "daemon") or is_within(m, "drivers.sim") for m in found)
