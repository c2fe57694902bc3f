"""The packages' public surfaces and the import direction that is the architecture.

The architecture is ``simulations -> coordinator -> site_agent``; inside the two main
packages, each wing (sub-package) is named for a concept and may not reach into the wings
listed for it below. Imports inside functions count: a late import is still a dependency.
"""

from __future__ import annotations

import ast
import importlib
from collections.abc import Iterator
from pathlib import Path

import pytest

PACKAGES = ("site_agent", "coordinator", "simulations")
ROOT = Path(__file__).resolve().parent.parent
MAY_NOT_IMPORT = {
    "site_agent": ("coordinator", "simulations"),
    "coordinator": ("simulations",),
    "simulations": (),
}
SITE_RUNTIME = (
    "site_agent.service",
    "site_agent.client_app",
    "site_agent.cli",
    "site_agent.evaluation",
    "site_agent.deployment",
)
"""The runtime at the top of the site agent, and its deployment wing (keys, connection,
task runner): they use the other wings, never the reverse."""

WING_MAY_NOT_IMPORT: dict[str, tuple[str, ...]] = {
    "site_agent.data": (
        "site_agent.contract",
        "site_agent.statistics",
        "site_agent.disclosure",
        "site_agent.training",
        *SITE_RUNTIME,
    ),
    "site_agent.statistics": ("site_agent.disclosure", "site_agent.training", *SITE_RUNTIME),
    "site_agent.contract": (
        "site_agent.data",
        "site_agent.disclosure",
        "site_agent.training",
        *SITE_RUNTIME,
    ),
    "site_agent.disclosure": ("site_agent.training", *SITE_RUNTIME),
    "site_agent.training": ("site_agent.disclosure", *SITE_RUNTIME),
    "coordinator.planning": (
        "coordinator.runs",
        "coordinator.pooling",
        "coordinator.adaptation",
        "coordinator.monitoring",
        "coordinator.report",
        "coordinator.deployment",
        "flwr",
    ),
    "coordinator.pooling": (
        "coordinator.adaptation",
        "coordinator.monitoring",
        "coordinator.report",
        "coordinator.deployment",
    ),
    "coordinator.adaptation": (
        "coordinator.runs",
        "coordinator.monitoring",
        "coordinator.report",
        "coordinator.deployment",
    ),
    "coordinator.monitoring": (
        "coordinator.pooling",
        "coordinator.adaptation",
        "coordinator.deployment",
    ),
    "coordinator.report": ("coordinator.runs", "coordinator.deployment", "flwr"),
    "coordinator.runs": ("coordinator.report", "coordinator.deployment"),
}


def _modules() -> Iterator[tuple[str, Path]]:
    for package in PACKAGES:
        for path in sorted((ROOT / package).rglob("*.py")):
            parts = path.relative_to(ROOT).with_suffix("").parts
            name = ".".join(parts[:-1] if parts[-1] == "__init__" else parts)
            yield name, path


def _imports(path: Path) -> Iterator[str]:
    """Every module named by an import statement, at any depth of the file."""
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            yield from (alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module:
            yield node.module
            yield from (f"{node.module}.{alias.name}" for alias in node.names)


def _within(name: str, prefix: str) -> bool:
    return name == prefix or name.startswith(prefix + ".")


@pytest.mark.parametrize("package", PACKAGES)
def test_every_public_name_resolves(package: str) -> None:
    """Each name in __all__ imports from its defining module, once, and is in the mapping."""
    module = importlib.import_module(package)
    assert len(set(module.__all__)) == len(module.__all__)
    assert set(module.__all__) == set(module._EXPORTS)
    for name in module.__all__:
        assert getattr(module, name) is not None
    with pytest.raises(AttributeError):
        _ = module.no_such_name


@pytest.mark.parametrize("package", PACKAGES)
def test_imports_follow_the_architecture(package: str) -> None:
    """Simulations -> coordinator -> site_agent: no module imports against the direction."""
    forbidden = MAY_NOT_IMPORT[package]
    offenders = [
        f"{name} imports {target}"
        for name, path in _modules()
        if _within(name, package)
        for target in _imports(path)
        if target.split(".")[0] in forbidden
    ]
    assert offenders == []


@pytest.mark.parametrize("wing", sorted(WING_MAY_NOT_IMPORT))
def test_wings_keep_their_direction(wing: str) -> None:
    """A wing never reaches into the wings its concept sits above."""
    assert (ROOT / Path(*wing.split("."))).is_dir(), wing
    offenders = [
        f"{name} imports {target}"
        for name, path in _modules()
        if _within(name, wing)
        for target in _imports(path)
        for banned in WING_MAY_NOT_IMPORT[wing]
        if _within(target, banned)
    ]
    assert offenders == []


def test_no_import_cycle() -> None:
    """The module graph (late imports included) has no cycle."""
    modules = dict(_modules())
    graph = {
        name: {t for t in _imports(path) if t in modules and t != name and t != name.split(".")[0]}
        for name, path in modules.items()
    }
    state: dict[str, int] = {}
    cycles: list[list[str]] = []

    def visit(node: str, trail: list[str]) -> None:
        state[node] = 1
        for nxt in sorted(graph[node]):
            if state.get(nxt) == 1:
                cycles.append([*trail[trail.index(nxt) :], nxt] if nxt in trail else [node, nxt])
            elif nxt not in state:
                visit(nxt, [*trail, nxt])
        state[node] = 2

    for name in sorted(graph):
        if name not in state:
            visit(name, [name])
    assert cycles == []
