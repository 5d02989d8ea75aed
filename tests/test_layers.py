"""The import rules of DEVELOPERS.md ("Layers and import rules"), read from the source with ast.

Every module of ``brimline.daemon`` and ``brimline.drivers`` belongs to one layer; a layer may
import only the layers listed for it. Function-local imports of project modules hide a layer
crossing from the reader, so they are refused too; an import of an optional extra inside a function
(pyadi-iio, ...) is fine. No module imports another module's private (``_name``) names.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PACKAGES = {"brimline.daemon": ROOT / "daemon", "brimline.drivers": ROOT / "drivers"}

#: module-name prefix -> layer (longest prefix wins)
LAYER_OF = {
    "brimline.daemon": "ground",  # the package itself (__version__)
    "brimline.daemon.records": "ground",
    "brimline.daemon.errors": "ground",
    "brimline.daemon.limits": "ground",
    "brimline.daemon.core": "core",
    "brimline.daemon.wire": "wire",
    "brimline.drivers.link": "link",
    "brimline.drivers.air": "air",
    "brimline.daemon.net": "net",
    "brimline.drivers.devices": "devices",
    "brimline.drivers.sources": "sources",
    "brimline.drivers.sinks": "sinks",
    "brimline.daemon.runtime": "runtime",
    "brimline.daemon.views": "views",
    "brimline.daemon.views.lookout": "views",  # the browser view's server (aiohttp)
    "brimline.daemon.views.lookout_data": "views",  # its pure page data
    "brimline.daemon.commands": "commands",
    "brimline.daemon.commands.lookout": "commands",
    "brimline.drivers": "ground",  # the package docstring only
    "brimline.daemon.__main__": "commands",
}

#: layer -> the layers its modules may import (its own included)
MAY_IMPORT = {
    "ground": {"ground"},
    "core": {"ground", "core"},
    "wire": {"ground", "core", "wire"},
    "link": {"ground", "core", "link"},
    "air": {"ground", "core", "link", "air"},
    "net": {"ground", "core", "wire", "net"},
    "devices": {"ground", "core", "link", "air", "devices"},
    "sources": {"ground", "core", "wire", "link", "air", "devices", "sources"},
    "sinks": {"ground", "core", "wire", "link", "air", "devices", "sources", "sinks"},
    "runtime": {"ground", "core", "wire", "link", "air", "net", "devices", "sources", "sinks",
                "runtime"},
    "views": {"ground", "core", "wire", "net", "runtime", "views"},
    "commands": set(LAYER_OF.values()),
}


def layer_of(module: str) -> str:
    """The layer of a ``brimline.*`` module name (longest matching prefix)."""
    best = max((p for p in LAYER_OF if module == p or module.startswith(p + ".")), key=len)
    return LAYER_OF[best]


def modules() -> list[tuple[str, Path]]:
    out = []
    for pkg, folder in PACKAGES.items():
        for path in sorted(folder.rglob("*.py")):
            rel = path.relative_to(folder).with_suffix("")
            parts = [p for p in rel.parts if p != "__init__"]
            out.append((".".join([pkg, *parts]), path))
    return out


def project_imports(path: Path):
    """Yield ``(line, module, names, local)`` for every import of a ``brimline`` module."""
    tree = ast.parse(path.read_text(), filename=str(path))
    local_lines = set()
    for fn in ast.walk(tree):
        if isinstance(fn, (ast.FunctionDef, ast.AsyncFunctionDef)):
            for node in ast.walk(fn):
                if isinstance(node, (ast.Import, ast.ImportFrom)):
                    local_lines.add(node.lineno)
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                if alias.name.startswith("brimline."):
                    yield node.lineno, alias.name, [], node.lineno in local_lines
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0 \
                and node.module.startswith("brimline"):
            names = [a.name for a in node.names]
            # ``from brimline.daemon.wire import codec`` imports the module ``...wire.codec``
            targets = [f"{node.module}.{n}" if f"{node.module}.{n}" in MODULES else node.module
                       for n in names]
            for target, name in zip(targets, names):
                yield node.lineno, target, [name], node.lineno in local_lines


MODULES = {name for name, _ in modules()}
ALL = modules()


def test_every_module_has_a_layer():
    for name, _ in ALL:
        assert layer_of(name) in MAY_IMPORT, name


@pytest.mark.parametrize("name,path", ALL, ids=[n for n, _ in ALL])
def test_imports_follow_the_layers(name, path):
    here = layer_of(name)
    bad = []
    for line, target, names, local in project_imports(path):
        where = f"{path.relative_to(ROOT)}:{line}"
        if layer_of(target) not in MAY_IMPORT[here]:
            bad.append(f"{where}: {here} layer imports {target} ({layer_of(target)} layer)")
        if local:
            bad.append(f"{where}: function-local import of {target} (import at the top)")
        for n in names:
            if n.startswith("_") and not n.startswith("__") and target != name:
                bad.append(f"{where}: private name {n} of {target}")
    assert not bad, "\n".join(bad)


def test_the_checker_sees_a_crossing(tmp_path):
    """The rule test itself: a core module that imports a socket module is caught."""
    src = tmp_path / "bad.py"
    src.write_text("from brimline.daemon.net.publisher import MapPublisher\n"
                   "def f():\n    from brimline.daemon.wire import codec\n")
    found = list(project_imports(src))
    assert [(t, local) for _, t, _, local in found] == [
        ("brimline.daemon.net.publisher", False), ("brimline.daemon.wire.codec", True)]
    assert layer_of("brimline.daemon.net.publisher") not in MAY_IMPORT["core"]
