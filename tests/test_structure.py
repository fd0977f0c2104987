"""The package's structure rules, checked by reading its source (no import is executed).

Every ``import`` and ``from ... import`` statement inside ``surfacekit/`` counts, at any
depth (module level, inside functions, under ``if TYPE_CHECKING:``), and so do
``importlib.import_module`` calls with a literal module name.  Rules:

* no import cycle between modules;
* stages in pipeline order, mesh 0 < io 1 < preparation 2 < correspondence 3 <
  analysis 4 < cohort 5 < app 6: a module never imports a module of a higher stage.
  Top-level modules (``surfacekit/__init__.py``, ``surfacekit/version.py``, ...) belong
  to no stage and are not checked as importees; the public ``surfacekit/__init__.py`` is
  also free to import every stage (it is the API on top of all of them);
* no ``import surfacekit`` / ``from surfacekit ...`` inside the package, and no
  ``from .. import name`` that reaches the package root the same way (doctest
  examples such as ``>>> import surfacekit as sk`` are text, not imports);
* no name starting with ``_`` imported from another module (dunder names such as
  ``__version__`` are public by convention);
* no module longer than 400 lines;
* no function longer than 80 lines of code, counted as the non-blank, non-comment
  lines of the function's body (nested functions included), without its docstring
  and without the ``def`` line, decorators and signature.

Each failure message lists every violation, not just the first.
"""
from __future__ import annotations

import ast
import io
import tokenize
from dataclasses import dataclass
from functools import cache
from pathlib import Path

PACKAGE = "surfacekit"
ROOT = Path(__file__).resolve().parents[1] / PACKAGE
STAGES = {"mesh": 0, "io": 1, "preparation": 2, "correspondence": 3, "analysis": 4, "cohort": 5, "app": 6}
MAX_MODULE_LINES = 400
MAX_FUNCTION_LINES = 80


@dataclass(frozen=True)
class Import:
    """One import edge: `importer` imports `names` from `module` (both dotted, absolute)."""

    importer: str
    module: str
    names: tuple
    line: int
    absolute_package: bool  # written as `import surfacekit...` / `from surfacekit ...`


def module_name(path: Path) -> str:
    parts = list(path.relative_to(ROOT.parent).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


@cache
def modules() -> dict:
    """Dotted module name -> path, for every .py file of the package."""
    return {module_name(p): p for p in sorted(ROOT.rglob("*.py"))}


def location(mod: str, line: int | None = None) -> str:
    rel = modules()[mod].relative_to(ROOT.parent).as_posix()
    return rel if line is None else f"{rel}:{line}"


def is_package(mod: str) -> bool:
    return modules()[mod].name == "__init__.py"


def resolve(importer: str, level: int, module: str | None) -> str:
    """Absolute module named by a (possibly relative) `from` clause, as Python resolves it."""
    if level == 0:
        return module or ""
    base = importer.split(".")
    if not is_package(importer):
        base = base[:-1]  # a plain module's package is its parent
    base = base[: len(base) - (level - 1)]
    return ".".join(base + ([module] if module else []))


def _import_module_call(node: ast.Call) -> tuple | None:
    """(name, package_is___name__) of an ``importlib.import_module("...")`` call with a literal name."""
    f = node.func
    callee = f.attr if isinstance(f, ast.Attribute) else f.id if isinstance(f, ast.Name) else None
    if callee != "import_module" or not node.args:
        return None
    arg = node.args[0]
    if not (isinstance(arg, ast.Constant) and isinstance(arg.value, str)):
        return None
    return arg.value, len(node.args) > 1 or any(k.arg == "package" for k in node.keywords)


@cache
def imports() -> tuple:
    """Every import edge in the package (statements at any depth, literal import_module calls)."""
    found = []
    for mod, path in modules().items():
        for node in ast.walk(ast.parse(path.read_text(encoding="utf-8"), str(path))):
            if isinstance(node, ast.Import):
                for alias in node.names:
                    found.append(Import(mod, alias.name, (), node.lineno,
                                        alias.name.split(".")[0] == PACKAGE))
            elif isinstance(node, ast.ImportFrom):
                target = resolve(mod, node.level, node.module)
                found.append(Import(mod, target, tuple(a.name for a in node.names), node.lineno,
                                    node.level == 0 and target.split(".")[0] == PACKAGE))
            elif isinstance(node, ast.Call) and (call := _import_module_call(node)):
                name, relative = call
                level = len(name) - len(name.lstrip("."))
                target = resolve(mod, level, name.lstrip(".") or None) if relative and level else name
                found.append(Import(mod, target, (), node.lineno,
                                    level == 0 and target.split(".")[0] == PACKAGE))
    return tuple(found)


def importees(edge: Import) -> list:
    """Modules of the package an import edge reaches: ``from pkg import sub`` reaches the
    submodule when `sub` is one, else the package's ``__init__``.  Parent packages that
    Python initialises on the way are not counted (every package imports its children)."""
    if edge.module not in modules():
        return []
    out = []
    for name in edge.names or ((),):
        sub = f"{edge.module}.{name}" if name else None
        out.append(sub if sub in modules() else edge.module)
    return sorted(set(out))


def stage(mod: str) -> int | None:
    """Stage number of a module in a stage folder; None for top-level modules."""
    parts = mod.split(".")
    return STAGES.get(parts[1]) if len(parts) > 1 else None


def graph() -> dict:
    g = {m: set() for m in modules()}
    for e in imports():
        for target in importees(e):
            if target != e.importer:
                g[e.importer].add(target)
    return g


def strongly_connected(g: dict) -> list:
    """Tarjan's strongly connected components (Tarjan, SIAM J. Comput. 1972), iteratively."""
    index, low, on, stack, out, counter = {}, {}, set(), [], [], [0]
    for root in sorted(g):
        if root in index:
            continue
        work = [(root, iter(sorted(g[root])))]
        index[root] = low[root] = counter[0]
        counter[0] += 1
        stack.append(root)
        on.add(root)
        while work:
            v, it = work[-1]
            for w in it:
                if w not in index:
                    index[w] = low[w] = counter[0]
                    counter[0] += 1
                    stack.append(w)
                    on.add(w)
                    work.append((w, iter(sorted(g[w]))))
                    break
                if w in on:
                    low[v] = min(low[v], index[w])
            else:
                work.pop()
                if work:
                    low[work[-1][0]] = min(low[work[-1][0]], low[v])
                if low[v] == index[v]:
                    comp = []
                    while True:
                        w = stack.pop()
                        on.discard(w)
                        comp.append(w)
                        if w == v:
                            break
                    if len(comp) > 1:
                        out.append(sorted(comp))
    return out


def a_cycle(g: dict, comp: list) -> list:
    """One concrete cycle through the first module of a strongly connected component."""
    members, start = set(comp), comp[0]
    prev, frontier = {start: None}, [start]
    while frontier:  # breadth-first search back to `start` inside the component
        nxt = []
        for v in frontier:
            for w in sorted(g[v] & members):
                if w == start:
                    path = [v]
                    while prev[path[-1]] is not None:
                        path.append(prev[path[-1]])
                    return path[::-1] + [start]
                if w not in prev:
                    prev[w] = v
                    nxt.append(w)
        frontier = nxt
    return comp


def report(title: str, violations: list) -> str:
    """Every violation, one a line, in file and line order."""
    def key(text):
        where = text.split(" ", 1)[0].rstrip(":").split(":")
        return where[0], int(where[1]) if len(where) > 1 and where[1].isdigit() else 0, text
    return f"{len(violations)} {title}:\n  " + "\n  ".join(sorted(violations, key=key))


# ----------------------------------------------------------------------------- tests
def test_the_package_is_where_the_test_looks():
    """Guard against a vacuous pass: the walk finds the stage folders and their imports."""
    found = {m.split(".")[1] for m in modules() if m.count(".") >= 1}
    assert set(STAGES) <= found, sorted(set(STAGES) - found)
    assert len(imports()) > 100


def test_the_checks_themselves_can_fail():
    """The helpers on known inputs: relative imports resolve as in the Python language
    reference (section 5.7, package relative imports), and a planted cycle is found."""
    assert resolve("surfacekit.correspondence.solver", 1, "shapes") == "surfacekit.correspondence.shapes"
    assert resolve("surfacekit.correspondence.solver", 2, "mesh") == "surfacekit.mesh"
    assert resolve("surfacekit.correspondence", 1, "options") == "surfacekit.correspondence.options"
    assert resolve("surfacekit.app.cli", 2, None) == "surfacekit"
    g = {"a": {"b"}, "b": {"c"}, "c": {"a"}, "d": {"a"}, "e": set()}
    assert strongly_connected(g) == [["a", "b", "c"]]
    assert a_cycle(g, ["a", "b", "c"]) == ["a", "b", "c", "a"]
    assert stage("surfacekit.mesh") == 0 and stage("surfacekit.app.cli") == 6
    assert stage("surfacekit") is None and stage("surfacekit.version") is None


def test_no_import_cycle():
    g = graph()
    cycles = [" -> ".join(a_cycle(g, comp)) + f"   (component: {', '.join(comp)})"
              for comp in strongly_connected(g)]
    assert not cycles, report("import cycles", cycles)


def test_no_module_imports_a_higher_stage():
    bad = []
    for e in imports():
        mine = stage(e.importer)
        if mine is None:  # top-level modules: the public API sits above every stage
            continue
        for target in importees(e):
            theirs = stage(target)
            if theirs is not None and theirs > mine:
                bad.append(f"{location(e.importer, e.line)}: stage {e.importer.split('.')[1]} ({mine}) "
                           f"imports {target} (stage {theirs})")
    assert not bad, report("imports of a higher stage", bad)


def test_no_import_of_the_package_itself_inside_the_package():
    bad = []
    for e in imports():
        if e.absolute_package:
            what = f"from {e.module} import ..." if e.names else f"import {e.module}"
            bad.append(f"{location(e.importer, e.line)}: {what} (use a relative import)")
        elif e.module == PACKAGE and e.importer != PACKAGE and any(
                f"{PACKAGE}.{n}" not in modules() for n in e.names):
            bad.append(f"{location(e.importer, e.line)}: imports {', '.join(e.names)} from the package root "
                       "(the same as `import surfacekit`)")
    assert not bad, report("imports of surfacekit from inside the package", bad)


def test_no_private_name_imported_from_another_module():
    bad = []
    for e in imports():
        if e.module not in modules():
            continue
        for name in e.names:
            if name.startswith("_") and not (name.startswith("__") and name.endswith("__")):
                bad.append(f"{location(e.importer, e.line)}: {name} from {e.module}")
    assert not bad, report("private names imported across modules", bad)


def test_no_module_over_400_lines():
    bad = []
    for mod, path in modules().items():
        n = len(path.read_text(encoding="utf-8").splitlines())
        if n > MAX_MODULE_LINES:
            bad.append(f"{location(mod)}: {n} lines")
    assert not bad, report(f"modules over {MAX_MODULE_LINES} lines", bad)


def code_lines(source: str) -> set:
    """Line numbers that carry code: any token other than comments, newlines and indentation
    (a multi-line string counts every line it spans)."""
    skip = {tokenize.COMMENT, tokenize.NL, tokenize.NEWLINE, tokenize.INDENT, tokenize.DEDENT,
            tokenize.ENDMARKER, tokenize.ENCODING}
    lines = set()
    for tok in tokenize.generate_tokens(io.StringIO(source).readline):
        if tok.type not in skip:
            lines.update(range(tok.start[0], tok.end[0] + 1))
    return lines


def function_lengths(source: str) -> list:
    """(qualified name, first line, lines of code of the body without docstring) per function."""
    tree, code = ast.parse(source), code_lines(source)
    out = []

    def visit(node, prefix):
        for child in ast.iter_child_nodes(node):
            if isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef)):
                body = set(range(child.body[0].lineno, child.end_lineno + 1)) & code
                first = child.body[0]
                if (isinstance(first, ast.Expr) and isinstance(first.value, ast.Constant)
                        and isinstance(first.value.value, str)):
                    body -= set(range(first.lineno, first.end_lineno + 1))
                out.append((prefix + child.name, child.lineno, len(body)))
                visit(child, prefix + child.name + ".")
            elif isinstance(child, ast.ClassDef):
                visit(child, prefix + child.name + ".")
            else:
                visit(child, prefix)

    visit(tree, "")
    return out


def test_function_length_counter_counts_code_only():
    """The counter itself: docstring, comments and blank lines do not count."""
    src = 'def f(x):\n    """Doc.\n\n    more doc\n    """\n    # why\n\n    y = (x +\n         1)\n    return y\n'
    assert function_lengths(src) == [("f", 1, 3)]


def test_no_function_over_80_lines_of_code():
    bad = []
    for mod, path in modules().items():
        for name, line, n in function_lengths(path.read_text(encoding="utf-8")):
            if n > MAX_FUNCTION_LINES:
                bad.append(f"{location(mod, line)}: {name} has {n} lines of code")
    assert not bad, report(f"functions over {MAX_FUNCTION_LINES} lines of code", bad)
