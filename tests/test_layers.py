"""The layering rules of qfit, read from the source with `ast` (no module is imported or run).

Source of the rules: the project's layer list (DEVELOPERS.md, "Architecture"): every module imports
only from its own layer or below, in the order

    errors, sizes, files (base) < ops < graph < data < runtime < quant < measure < memory < search
    < check < report < cli

Imports inside functions count the same as imports at the top: a lazy import hides a dependency, it
does not remove it. A second rule: operator knowledge lives in qfit/ops/ only, so no module outside
it compares a node's `op_type` with an operator's name (QuantizeLinear / DequantizeLinear, the QDQ
structure every quantized model has, excepted). Each checker is also run on planted violations
written below as source strings, so a checker that cannot fail would be caught here.
"""
from __future__ import annotations

import ast
import pathlib

QFIT = pathlib.Path(__file__).resolve().parent.parent / "qfit"

BASE_MODULES = ("errors", "sizes", "files")
LAYERS = ("ops", "graph", "data", "runtime", "quant", "measure", "memory", "search", "check", "report", "cli")
QDQ_NAMES = {"QuantizeLinear", "DequantizeLinear"}


# ---- reading the sources ----------------------------------------------------------------------

def qfit_sources() -> dict[str, str]:
    """Dotted module name -> source, for every .py file under qfit/."""
    sources = {}
    for path in sorted(QFIT.rglob("*.py")):
        parts = list(path.relative_to(QFIT.parent).with_suffix("").parts)
        if parts[-1] == "__init__":
            parts.pop()
        sources[".".join(parts)] = path.read_text(encoding="utf-8")
    return sources


def _is_package(name: str, modules: set[str]) -> bool:
    return any(m.startswith(name + ".") for m in modules)


def _resolve(importer: str, node: ast.AST, modules: set[str]) -> list[str]:
    """The qfit modules one import statement loads (a `from X import name` counts as module X.name
    when that is a module, else as X itself)."""
    if isinstance(node, ast.Import):
        return [a.name for a in node.names if a.name == "qfit" or a.name.startswith("qfit.")]
    if not isinstance(node, ast.ImportFrom):
        return []
    if node.level:
        package = importer if _is_package(importer, modules) else importer.rpartition(".")[0]
        for _ in range(node.level - 1):
            package = package.rpartition(".")[0]
        base = f"{package}.{node.module}" if node.module else package
    else:
        base = node.module or ""
    if base != "qfit" and not base.startswith("qfit."):
        return []
    return [f"{base}.{a.name}" if f"{base}.{a.name}" in modules else base for a in node.names]


def import_edges(sources: dict[str, str]) -> dict[str, set[str]]:
    """Module -> the qfit modules it imports (anywhere in the file)."""
    modules = set(sources)
    edges: dict[str, set[str]] = {}
    for name, source in sources.items():
        found = set()
        for node in ast.walk(ast.parse(source)):
            found.update(_resolve(name, node, modules))
        edges[name] = {m for m in found if m != name}
    return edges


# ---- the two import rules ---------------------------------------------------------------------

def layer_of(module: str) -> int:
    """0 for the base modules (and the qfit package itself), then 1 + the position in LAYERS."""
    parts = module.split(".")
    if len(parts) == 1 or parts[1] in BASE_MODULES:
        return 0
    if parts[1] not in LAYERS:
        raise AssertionError(f"{module}: not in the layer list of tests/test_layers.py (add its folder)")
    return 1 + LAYERS.index(parts[1])


def upward_imports(edges: dict[str, set[str]]) -> list[str]:
    return sorted(f"{m} (layer {layer_of(m)}) imports {t} (layer {layer_of(t)})"
                  for m, targets in edges.items() for t in targets if layer_of(t) > layer_of(m))


def import_cycles(edges: dict[str, set[str]]) -> list[list[str]]:
    """Every strongly connected group of more than one module (Tarjan 1972), as a sorted list."""
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    groups: list[list[str]] = []

    def visit(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(edges.get(v, ())):
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on_stack:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            group = []
            while True:
                w = stack.pop()
                on_stack.discard(w)
                group.append(w)
                if w == v:
                    break
            if len(group) > 1:
                groups.append(sorted(group))

    for v in sorted(edges):
        if v not in index:
            visit(v)
    return sorted(groups)


# ---- the operator-name rule -------------------------------------------------------------------

def _string_set(node: ast.AST, named: dict[str, set[str]]) -> set[str] | None:
    """The strings a comparison operand stands for: a literal, a tuple/list/set of literals, or a
    module-level name bound to one of those."""
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return {node.value}
    if isinstance(node, (ast.Tuple, ast.List, ast.Set)):
        values = [e.value for e in node.elts if isinstance(e, ast.Constant) and isinstance(e.value, str)]
        return set(values) if values else None
    if isinstance(node, ast.Name) and node.id in named:
        return named[node.id]
    return None


def op_name_comparisons(source: str) -> list[str]:
    """Comparisons of `<x>.op_type` with operator names other than the QDQ ones, as 'line: names'."""
    tree = ast.parse(source)
    named: dict[str, set[str]] = {}
    for statement in tree.body:
        if isinstance(statement, ast.Assign):
            value = _string_set(statement.value, {})
            for target in statement.targets:
                if isinstance(target, ast.Name) and value:
                    named[target.id] = value
    found = []
    for node in ast.walk(tree):
        if not isinstance(node, ast.Compare):
            continue
        operands = [node.left, *node.comparators]
        if not any(isinstance(o, ast.Attribute) and o.attr == "op_type" for o in operands):
            continue
        names = set()
        for operand in operands:
            names |= _string_set(operand, named) or set()
        if names - QDQ_NAMES:
            found.append(f"{node.lineno}: {', '.join(sorted(names - QDQ_NAMES))}")
    return found


# ---- the tests --------------------------------------------------------------------------------

def test_every_module_imports_only_its_own_layer_or_below():
    assert upward_imports(import_edges(qfit_sources())) == []


def test_qfit_has_no_import_cycle():
    assert import_cycles(import_edges(qfit_sources())) == []


def test_no_module_outside_ops_compares_op_type_with_an_operator_name():
    found = {name: hits for name, source in qfit_sources().items()
             if not name.startswith("qfit.ops") and (hits := op_name_comparisons(source))}
    assert found == {}


def test_planted_upward_import_and_cycle_are_caught():
    planted = {
        "qfit.ops.bad": "def f():\n    from qfit.memory import budget\n",    # ops (1) -> memory (7), lazily
        "qfit.memory.budget": "from qfit.memory import whatif\n",
        "qfit.memory.whatif": "from . import budget\n",                      # budget <-> whatif, relative
        "qfit.graph.fine": "from qfit.errors import QfitError\nimport qfit.ops.bad\n",
        "qfit.errors": "",
    }
    edges = import_edges(planted)
    assert edges["qfit.ops.bad"] == {"qfit.memory.budget"}
    assert edges["qfit.memory.whatif"] == {"qfit.memory.budget"}
    assert upward_imports(edges) == ["qfit.ops.bad (layer 1) imports qfit.memory.budget (layer 7)"]
    assert import_cycles(edges) == [["qfit.memory.budget", "qfit.memory.whatif"]]


def test_planted_op_type_comparisons_are_caught_and_qdq_names_are_not():
    planted = (
        "_WINDOWED = {'Conv', 'MaxPool'}\n"
        "def f(node, prev):\n"
        "    if node.op_type == 'Conv':\n"                    # line 3
        "        pass\n"
        "    if 'Gemm' != prev.op_type:\n"                    # line 5
        "        pass\n"
        "    if node.op_type in ('Relu', 'Clip'):\n"          # line 7
        "        pass\n"
        "    if node.op_type in _WINDOWED:\n"                 # line 9
        "        pass\n"
        "    if node.op_type == 'DequantizeLinear' or node.op_type in ('QuantizeLinear',):\n"
        "        pass\n"
        "    row = {'op_type': node.op_type}\n"               # a name passed into a report row
        "    return node.op_type == prev.op_type\n"
    )
    assert op_name_comparisons(planted) == ["3: Conv", "5: Gemm", "7: Clip, Relu", "9: Conv, MaxPool"]
