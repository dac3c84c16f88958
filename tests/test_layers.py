"""The package layout keeps its promise: imports go down the layers, never up, and never in a cycle.

The layers are the project's own architecture (DEVELOPERS.md, "Folders and what
they may import"); the check reads every module's import statements with the
standard library's `ast`, so an import hidden in a function body counts too.
"""

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent

# Lowest first. A module may import its own layer's modules and any lower layer's.
LAYERS = [
    ["decoder.messages"],
    ["decoder.space"],
    ["decoder.inference"],
    ["decoder.signals"],
    ["decoder.encoding"],
    ["decoder.config"],
    ["decoder.session"],
    ["rig_adapters.console"],
    ["rig_adapters.wire"],
    ["rig_adapters.sessions"],
    ["rig_adapters.exchange"],
    ["rig_adapters.sim"],
    ["rig_adapters.live", "rig_adapters.lsl"],
    ["rig_adapters.offline", "rig_adapters.monitor"],
    ["rig_adapters.cli"],
]
FORBIDDEN_IN_CORE = ("zmq", "msgpack", "rig_adapters", "importlib")
MAX_LINES = 700
LONG_FILES_ALLOWED = {"decoder/inference/_kernels.py"}  # the kernels file (DEVELOPERS.md)


def _modules():
    for package in ("decoder", "rig_adapters"):
        for path in sorted((ROOT / package).rglob("*.py")):
            rel = path.relative_to(ROOT).with_suffix("")
            parts = list(rel.parts)
            if parts[-1] == "__init__":
                parts = parts[:-1]
            yield ".".join(parts), path


def _layer_of(module: str) -> int:
    for i, names in enumerate(LAYERS):
        if any(module == n or module.startswith(n + ".") for n in names):
            return i
    raise AssertionError(f"{module} belongs to no layer; add it to LAYERS and DEVELOPERS.md")


def _imports(path: Path) -> set[str]:
    out = set()
    for node in ast.walk(ast.parse(path.read_text())):
        if isinstance(node, ast.Import):
            out.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            out.add(node.module)
            out.update(f"{node.module}.{alias.name}" for alias in node.names)
    return out


MODULES = dict(_modules())


@pytest.mark.parametrize("module", sorted(MODULES))
def test_no_module_imports_a_higher_layer(module):
    if module in ("decoder", "rig_adapters"):
        return
    own = _layer_of(module)
    for name in _imports(MODULES[module]):
        if name.split(".")[0] not in ("decoder", "rig_adapters") or name not in MODULES:
            continue
        assert _layer_of(name) <= own, f"{module} imports {name}, a higher layer"


@pytest.mark.parametrize("module", sorted(m for m in MODULES if m.startswith("decoder")))
def test_the_core_imports_no_shell_no_sockets_no_importlib(module):
    for name in _imports(MODULES[module]):
        assert name.split(".")[0] not in FORBIDDEN_IN_CORE, f"{module} imports {name}"


def test_no_import_cycle():
    graph = {m: {n for n in _imports(p) if n in MODULES and n != m} for m, p in MODULES.items()}
    state: dict[str, int] = {}

    def visit(m, path):
        state[m] = 1
        for n in graph[m]:
            if state.get(n) == 1:
                raise AssertionError("import cycle: " + " -> ".join(path + [n]))
            if n not in state:
                visit(n, path + [n])
        state[m] = 2

    for m in graph:
        if m not in state:
            visit(m, [m])


def test_rig_adapters_top_level_holds_only_the_command_and_the_console():
    top = sorted(p.name for p in (ROOT / "rig_adapters").glob("*.py"))
    assert top == ["__init__.py", "cli.py", "console.py"]


def test_at_least_four_subpackages_in_each_package():
    for package in ("decoder", "rig_adapters"):
        subs = [p for p in (ROOT / package).iterdir() if (p / "__init__.py").exists()]
        assert len(subs) >= 4, (package, subs)


def test_no_source_file_is_longer_than_a_sitting():
    for path in list((ROOT / "decoder").rglob("*.py")) + list((ROOT / "rig_adapters").rglob("*.py")):
        rel = path.relative_to(ROOT).as_posix()
        if rel in LONG_FILES_ALLOWED:
            continue
        n = len(path.read_text().splitlines())
        assert n <= MAX_LINES, f"{rel} has {n} lines"
