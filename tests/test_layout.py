"""The layout of pipeline/ (issue "one package per step"), read from the source with `ast`.

* A step package imports pipeline.core and, of earlier steps, only their
  product readers (``pipeline.<package>.products`` or ``.io``); never a later
  step, never the workflow glue. pipeline.core imports only pipeline.core.
* No import cycles, between packages or between modules (imports inside
  functions count: they are cycles deferred, not removed).
* No module above ~500 lines without a reason written at its top.
* The rule files only wire: no ``config.get(..., default)``, no ``def``; the
  defaults live in config/schema.yaml.

Truth: the import statements and line counts of the files themselves, and the
order of the steps in the workflow (DEVELOPERS.md, "Architecture").
"""

import ast
import re
from pathlib import Path

import pytest

from conftest import REPO_ROOT

PIPELINE = REPO_ROOT / "pipeline"
#: the step packages in workflow order: each may read the products of those before it
STEP_ORDER = ("night", "ccd", "wavelength", "extraction", "fluxcal", "combine", "products")
#: modules that hold the public product readers of a package
READER_MODULES = ("products", "io")
#: the glue: may import every package (it dispatches to the adapters)
GLUE = ("workflow",)
MAX_LINES = 500
#: modules over MAX_LINES allowed without a reason at their top (none today: every long module
#: says why in its docstring)
SIZE_EXCEPTIONS = {}
#: imports allowed to break the rule, each with the move that would remove it (none today)
IMPORT_EXCEPTIONS = {}
#: how a module says why it is long: a line of its docstring starting with this
SIZE_REASON = re.compile(r"^\s*Longer than 500 lines because\b", re.MULTILINE)


def _modules():
    return sorted(p for p in PIPELINE.rglob("*.py") if "__pycache__" not in p.parts)


def _module_name(path):
    parts = list(path.relative_to(REPO_ROOT).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def _imports(path):
    """Every ``pipeline`` module ``path`` imports (top level or inside functions)."""
    tree = ast.parse(path.read_text(), filename=str(path))
    package = _module_name(path).rsplit(".", 1)[0] if path.name != "__init__.py" \
        else _module_name(path)
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            found.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom):
            base = node.module or ""
            if node.level:
                anchor = package.split(".")
                anchor = anchor[:len(anchor) - (node.level - 1)]
                base = ".".join(anchor + ([base] if base else []))
            found.add(base)
            # `from pipeline.extraction import trace` imports the module pipeline.extraction.trace
            for alias in node.names:
                candidate = f"{base}.{alias.name}"
                if (PIPELINE.parent / (candidate.replace(".", "/") + ".py")).exists():
                    found.add(candidate)
    return {name for name in found if name == "pipeline" or name.startswith("pipeline.")}


def _package(module):
    parts = module.split(".")
    return parts[1] if len(parts) > 1 else ""


def _import_problems(module, imported):
    """Why ``module`` may not import ``imported`` ('' when it may)."""
    own, other = _package(module), _package(imported)
    if other in ("", own, "core") or own in GLUE:
        return ""
    if own == "core":
        return "pipeline.core imports only pipeline.core"
    if other in GLUE:
        return "a step never imports the workflow glue"
    if own not in STEP_ORDER or other not in STEP_ORDER:
        return f"unknown package {own if own not in STEP_ORDER else other!r}: add it to STEP_ORDER"
    if STEP_ORDER.index(other) > STEP_ORDER.index(own):
        return f"{other} runs after {own}: a step reads only earlier steps' products"
    if imported.split(".")[-1] not in READER_MODULES:
        return (f"only the product readers of {other} ({', '.join(f'pipeline.{other}.{m}' for m in READER_MODULES)}) "
                "may be imported, not its internals")
    return ""


def _graph():
    return {_module_name(p): _imports(p) for p in _modules()}


def test_steps_import_only_core_and_earlier_product_readers():
    problems = [f"{module} imports {imported}: {why}"
                for module, imports in _graph().items() for imported in sorted(imports)
                if (why := _import_problems(module, imported))
                and (module, imported) not in IMPORT_EXCEPTIONS]
    assert not problems, "\n".join(problems)


def test_the_rule_catches_what_it_should():
    # the rule itself, on the cases it exists for (it must be able to fail)
    assert _import_problems("pipeline.fluxcal.calibrate", "pipeline.extraction.trace")
    assert _import_problems("pipeline.ccd.flat", "pipeline.fluxcal.products")
    assert _import_problems("pipeline.core.frames", "pipeline.night.inventory")
    assert _import_problems("pipeline.wavelength.solve", "pipeline.workflow.plan")
    assert not _import_problems("pipeline.extraction.rectify", "pipeline.wavelength.products")
    assert not _import_problems("pipeline.extraction.rectify", "pipeline.core.frames")
    assert not _import_problems("pipeline.workflow.plan", "pipeline.night.inventory")


def _cycles(graph):
    """Import cycles in ``graph`` (module -> imported modules), each as a list of names."""
    found, state = [], {}

    def visit(node, stack):
        state[node] = "open"
        stack.append(node)
        for nxt in sorted(graph.get(node, ())):
            if nxt not in graph or nxt == node:
                continue
            if state.get(nxt) == "open":
                found.append(stack[stack.index(nxt):] + [nxt])
            elif nxt not in state:
                visit(nxt, stack)
        stack.pop()
        state[node] = "done"

    for node in sorted(graph):
        if node not in state:
            visit(node, [])
    return found


def test_cycle_finder_finds_a_cycle():
    assert _cycles({"a": {"b"}, "b": {"c"}, "c": {"a"}}) == [["a", "b", "c", "a"]]
    assert _cycles({"a": {"b"}, "b": set()}) == []


def test_no_import_cycles_between_modules():
    graph = _graph()
    # a package's __init__ importing its own modules is the package, not a cycle
    graph = {m: {i for i in imports if not (m.startswith(i + ".") and i.count(".") < m.count("."))}
             for m, imports in graph.items()}
    cycles = _cycles(graph)
    assert not cycles, "\n".join(" -> ".join(c) for c in cycles)


def test_no_import_cycles_between_packages():
    graph = {}
    for module, imports in _graph().items():
        graph.setdefault(_package(module), set()).update(
            _package(i) for i in imports if _package(i) not in ("", _package(module)))
    cycles = _cycles(graph)
    assert not cycles, "\n".join(" -> ".join(c) for c in cycles)


def test_long_modules_say_why_at_their_top():
    problems = []
    for path in _modules():
        lines = len(path.read_text().splitlines())
        name = str(path.relative_to(REPO_ROOT))
        if lines <= MAX_LINES or name in SIZE_EXCEPTIONS:
            continue
        docstring = ast.get_docstring(ast.parse(path.read_text())) or ""
        if not SIZE_REASON.search(docstring):
            problems.append(f"{name}: {lines} lines; split it or start a docstring line with "
                            f"'Longer than 500 lines because ...'")
    assert not problems, "\n".join(problems)


RULE_FILES = sorted((PIPELINE / "rules").glob("*.smk")) + [REPO_ROOT / "Snakefile"]


@pytest.mark.parametrize("path", RULE_FILES, ids=lambda p: p.name)
def test_rule_files_only_wire(path):
    text = path.read_text()
    # defaults live in config/schema.yaml: the validated config already holds them
    assert not re.search(r"\.get\([^)]*,", text), f"{path.name}: .get(key, default) in a rule file"
    assert not re.search(r"^\s*def ", text, re.MULTILINE), f"{path.name}: Python helpers belong in " \
        "pipeline/workflow/plan.py"
