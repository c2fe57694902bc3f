"""The packages' public surfaces and the import direction that is the architecture."""

from __future__ import annotations

import ast
import importlib
from pathlib import Path

import pytest

PACKAGES = ("site_agent", "coordinator", "simulations")
ROOT = Path(__file__).resolve().parent.parent
MAY_NOT_IMPORT = {
    "site_agent": ("coordinator", "simulations"),
    "coordinator": ("simulations",),
    "simulations": (),
}


@pytest.mark.parametrize("package", PACKAGES)
def test_every_public_name_resolves(package: str) -> None:
    """Each name in __all__ imports from its defining module, once."""
    module = importlib.import_module(package)
    assert len(set(module.__all__)) == len(module.__all__)
    for name in module.__all__:
        assert getattr(module, name) is not None
    with pytest.raises(AttributeError):
        _ = module.no_such_name


@pytest.mark.parametrize("package", PACKAGES)
def test_imports_follow_the_architecture(package: str) -> None:
    """Simulations -> coordinator -> site_agent: no module imports against the direction."""
    forbidden = MAY_NOT_IMPORT[package]
    offenders = []
    for path in sorted((ROOT / package).glob("*.py")):
        for node in ast.walk(ast.parse(path.read_text())):
            names: list[str] = []
            if isinstance(node, ast.Import):
                names = [alias.name for alias in node.names]
            elif isinstance(node, ast.ImportFrom) and node.module:
                names = [node.module]
            offenders += [
                f"{path.name} imports {name}" for name in names if name.split(".")[0] in forbidden
            ]
    assert offenders == []
