"""The import contract: one-way layers (DEVELOPERS.md, "Architecture").

Every ``import`` in the installed code (module level and inside functions alike) is read
with ``ast`` and checked against the layers below: a module may import its own layer and
the layers under it, never one above. Within the middle layer the simulated rig and the
host's plumbing are independent of each other, and the run engine reaches the rig only
through the factory it is handed. A new module must be placed in a layer here, so the
picture in the contributor guide stays complete. The same checks as import-linter's
"layers" and "forbidden" contracts, written out so that they also see the folders that
install under the ``clampcore`` name (pyproject.toml's ``package-dir``).
"""

from __future__ import annotations

import ast
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
# folder -> import name (pyproject.toml [tool.setuptools.package-dir])
FOLDERS = {
    "clampcore": "clampcore",
    "gui": "clampcore.gui",
    "simulated_rig": "clampcore.simulated_rig",
    "firmware_protocol": "clampcore.firmware_protocol",
}

# Bottom to top. A name matches itself and everything below it in the dotted tree.
LAYERS: list[tuple[str, list[str]]] = [
    (
        "compiled helpers and system calls",
        ["clampcore.jit", "clampcore.sysio", "clampcore.rng", "clampcore.realtime"],
    ),
    ("protocol", ["clampcore.firmware_protocol"]),
    (
        "model",
        [
            "clampcore.fields",
            "clampcore.schema",
            "clampcore.experiment",
            "clampcore.elements",
            "clampcore.step",
            "clampcore.program",
            "clampcore.calibration",
            "clampcore.roundtrip",
            "clampcore.law",
            "clampcore.links",
            "clampcore.stability",
            # The model cells live with the rig (it owns the cell on the bench) but are pure
            # physics, used by the offline simulation too.
            "clampcore.simulated_rig.cells",
        ],
    ),
    (
        "simulated rig | offline simulation, real-time plumbing, storage",
        [
            "clampcore.simulated_rig",
            "clampcore.offline",
            "clampcore.linksim",
            "clampcore.shared",
            "clampcore.health",
            "clampcore.hostloop",
            "clampcore.lawloop",
            "clampcore.board_link",
            "clampcore.journal",
            "clampcore.nwb",
            "clampcore.nwb_metadata",
            "clampcore.nwb_series",
            "clampcore.nwb_tables",
            "clampcore.nwb_spool",
            "clampcore.recorder",
        ],
    ),
    # preflight: the engine's pure start/refuse decision (board's HELLO, experiment, options)
    ("run engine", ["clampcore.preflight", "clampcore.engine"]),
    (
        "user interfaces and analysis",
        [
            "clampcore.__main__",
            "clampcore.cli",
            "clampcore.console",
            "clampcore.demo",
            "clampcore.show",
            "clampcore.plot",
            "clampcore.protocols",
            "clampcore.cellfeatures",
            "clampcore.report",
            "clampcore.characterize",
            "clampcore.cellfit",
            "clampcore.gui",
        ],
    ),
]

# (importers, imported, why) on top of the layers; the model cells
# (clampcore.simulated_rig.cells) are in the model layer and exempt from both rules.
FORBIDDEN = [
    (
        "clampcore.simulated_rig",
        "clampcore.offline clampcore.linksim clampcore.shared clampcore.health "
        "clampcore.hostloop clampcore.lawloop clampcore.board_link clampcore.journal "
        "clampcore.nwb clampcore.recorder",
        "the rig is a board on a port: it shares nothing with the host's plumbing",
    ),
    (
        "clampcore.offline clampcore.linksim clampcore.shared clampcore.health "
        "clampcore.hostloop clampcore.lawloop clampcore.board_link clampcore.journal "
        "clampcore.nwb clampcore.recorder clampcore.engine",
        "clampcore.simulated_rig",
        "the host reaches the rig only through a port, and the engine through the factory "
        "it is handed",
    ),
]

# Scripts that are run, never imported, and may reach up (each with its reason).
EXEMPT = {
    # Generates the board's shared test vectors from the host's own law computation.
    "clampcore.firmware_protocol.vectors.generate_law",
}


def _modules() -> dict[str, Path]:
    found: dict[str, Path] = {}
    for folder, name in FOLDERS.items():
        for path in sorted((ROOT / folder).rglob("*.py")):
            parts = list(path.relative_to(ROOT / folder).with_suffix("").parts)
            if parts[-1] == "__init__":
                parts.pop()
            found[".".join([name, *parts])] = path
    return found


MODULES = _modules()


def _imports(module: str, path: Path) -> set[str]:
    """Every project module ``module`` imports at run time (a name imported from a package
    counts as that package's submodule when one exists). Imports under
    ``if TYPE_CHECKING:`` are annotations only and do not count (as import-linter's
    ``exclude_type_checking_imports``)."""
    package = module if path.name == "__init__.py" else module.rpartition(".")[0]
    tree = ast.parse(path.read_text(encoding="utf-8"))
    typing_only = {
        id(inner)
        for node in ast.walk(tree)
        if isinstance(node, ast.If) and ast.unparse(node.test).endswith("TYPE_CHECKING")
        for stmt in node.body
        for inner in ast.walk(stmt)
    }
    out: set[str] = set()
    for node in ast.walk(tree):
        if id(node) in typing_only:
            continue
        if isinstance(node, ast.Import):
            names = [alias.name for alias in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package.split(".")[: len(package.split(".")) - (node.level - 1)]
                origin = ".".join(base + ([node.module] if node.module else []))
            else:
                origin = node.module or ""
            names = [origin] + [f"{origin}.{alias.name}" for alias in node.names]
        else:
            continue
        for name in names:
            while name and name not in MODULES:
                name = name.rpartition(".")[0]
            if name and name != module and name != "clampcore":
                out.add(name)
    return out


GRAPH = {m: _imports(m, p) for m, p in MODULES.items()}


def _match(module: str, names: list[str] | str) -> str | None:
    """The most specific of ``names`` that ``module`` is or lies under."""
    names = names.split() if isinstance(names, str) else names
    hits = [n for n in names if module == n or module.startswith(n + ".")]
    return max(hits, key=len) if hits else None


def _layer(module: str) -> int | None:
    best: tuple[int, int] | None = None  # (specificity, layer)
    for index, (_, names) in enumerate(LAYERS):
        hit = _match(module, names)
        if hit and (best is None or len(hit) > best[0]):
            best = (len(hit), index)
    return None if best is None else best[1]


def test_every_module_has_a_layer():
    unplaced = [m for m in MODULES if m != "clampcore" and _layer(m) is None]
    assert not unplaced, f"place these modules in a layer (tests/test_architecture.py): {unplaced}"


def test_no_module_imports_a_layer_above_its_own():
    broken = []
    for module, targets in GRAPH.items():
        if module in EXEMPT or module == "clampcore":
            continue
        for target in targets:
            if _layer(target) > _layer(module):
                broken.append(
                    f"{module} ({LAYERS[_layer(module)][0]}) imports {target} "
                    f"({LAYERS[_layer(target)][0]})"
                )
    assert not broken, "\n".join(broken)


@pytest.mark.parametrize("importers, imported, why", FORBIDDEN)
def test_forbidden_imports(importers, imported, why):
    cells = "clampcore.simulated_rig.cells"
    broken = [
        f"{m} imports {t}"
        for m, targets in GRAPH.items()
        if _match(m, importers) and not _match(m, cells)
        for t in targets
        if _match(t, imported) and not _match(t, cells)
    ]
    assert not broken, f"{why}: " + "; ".join(broken)


def test_no_import_cycles():
    """Tarjan's strongly connected components over the module graph: none larger than one."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    cycles: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in GRAPH.get(v, ()):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            component = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                component.append(w)
                if w == v:
                    break
            if len(component) > 1:
                cycles.append(sorted(component))

    for v in GRAPH:
        if v not in index:
            visit(v)
    assert not cycles, f"import cycles: {cycles}"


def test_the_contract_sees_real_imports():
    """The reader is not blind: known edges of the data path are found."""
    assert "clampcore.step" in GRAPH["clampcore.hostloop"]
    assert "clampcore.firmware_protocol.codec" in GRAPH["clampcore.hostloop"]
    assert "clampcore.engine" in GRAPH["clampcore.gui.window"]
    # an annotation-only import (synapse.py: ProgramArrays) is not a run-time edge
    assert "clampcore.program" not in GRAPH["clampcore.elements.synapse"]
    assert _layer("clampcore.gui.window") > _layer("clampcore.engine") > _layer("clampcore.step")


def test_installed_names_all_live_under_clampcore():
    """No generic top-level name (such as ``gui``) lands in site-packages, and every folder
    with Python modules or the C core's files is installed."""
    tool = tomllib.loads((ROOT / "pyproject.toml").read_text())["tool"]["setuptools"]
    packages = tool["packages"]
    assert all(p == "clampcore" or p.startswith("clampcore.") for p in packages), packages
    assert {k: v for k, v in tool["package-dir"].items()} == {v: k for k, v in FOLDERS.items()}
    wanted = set()
    for folder, name in FOLDERS.items():
        for d in [ROOT / folder, *sorted((ROOT / folder).rglob("*"))]:
            if (
                d.is_dir()
                and d.name != "__pycache__"
                and any(f.suffix in {".py", ".c", ".h", ".json", ".md"} for f in d.iterdir())
            ):
                wanted.add(".".join([name, *d.relative_to(ROOT / folder).parts]))
    assert set(packages) == wanted


def test_compiled_functions_take_at_most_eight_parameters():
    """Arrays travel in named bundles (NamedTuples named after their owner), not as long
    positional lists (DEVELOPERS.md, "Rules of the house")."""
    compiled = {"kernel", "njit", "jit"}
    long = []
    for module, path in MODULES.items():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"))):
            if not isinstance(node, ast.FunctionDef):
                continue
            names = {ast.unparse(d).split("(")[0].rpartition(".")[2] for d in node.decorator_list}
            if names & compiled and len(node.args.args) > 8:
                long.append(f"{module}.{node.name}: {len(node.args.args)} parameters")
    assert not long, long
