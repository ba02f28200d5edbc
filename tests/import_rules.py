"""The house's import rules, read from the source with ``ast`` (DEVELOPERS.md, "How the house
is laid out"); tests/test_package.py applies them to the repository and to planted
violations.

An import site is one ``import``/``from ... import`` statement, with the modules it loads
(``from a import b`` loads ``a`` and, when ``a.b`` is a module of ours, ``a.b``), whether it
sits inside a function body and whether it sits under ``if TYPE_CHECKING:`` (annotations
only: never run).
"""

from __future__ import annotations

import ast
from dataclasses import dataclass
from pathlib import Path

# top-level folders mapped into the one import package (pyproject.toml, package-dir)
PACKAGE_OF_FOLDER = {
    "data_schemas": "stopwise.data_schemas",
    "models": "stopwise.models",
    "estimation": "stopwise.estimation",
}
CORE, ML, BAYES = "stopwise.estimation", "stopwise.estimation.ml", "stopwise.estimation.bayes"
WINGS_ALLOWED = {"core": {"core"}, "ml": {"core", "ml"}, "bayes": {"core", "bayes"}}


@dataclass(frozen=True)
class ImportSite:
    path: str  # file, relative to the root, with "/"
    line: int
    importer: str  # dotted module of the file
    targets: tuple[str, ...]  # dotted modules the statement loads
    written: str  # the module as written (``node.module`` or the imported name)
    in_function: bool
    type_checking: bool


def module_of(root: Path, path: Path) -> str:
    """Dotted module name of a file under one of the mapped folders."""
    parts = list(path.relative_to(root).with_suffix("").parts)
    parts[0] = PACKAGE_OF_FOLDER[parts[0]]
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join(parts)


def known_modules(root: Path, folders: tuple[str, ...]) -> dict[str, Path]:
    """Every module of ours under ``folders``: dotted name -> file."""
    return {
        module_of(root, path): path
        for folder in folders
        for path in sorted((root / folder).rglob("*.py"))
    }


def _resolve(importer: str, is_package: bool, module: str | None, level: int) -> str:
    """Absolute module of ``from <level dots><module> import ...`` inside ``importer``."""
    if level == 0:
        return module or ""
    base = importer.split(".")
    base = base if is_package else base[:-1]
    base = base[: len(base) - (level - 1)]
    return ".".join([*base, module] if module else base)


def _is_type_checking(test: ast.expr) -> bool:
    return (isinstance(test, ast.Name) and test.id == "TYPE_CHECKING") or (
        isinstance(test, ast.Attribute) and test.attr == "TYPE_CHECKING"
    )


def sites_in_file(root: Path, path: Path, modules: dict[str, Path]) -> list[ImportSite]:
    """The import sites of one file (module docstring)."""
    importer = module_of(root, path)
    is_package = path.name == "__init__.py"
    rel = path.relative_to(root).as_posix()
    out: list[ImportSite] = []

    def visit(node: ast.AST, in_function: bool, type_checking: bool) -> None:
        for child in ast.iter_child_nodes(node):
            if isinstance(child, ast.Import):
                for alias in child.names:
                    out.append(
                        ImportSite(
                            rel,
                            child.lineno,
                            importer,
                            (alias.name,),
                            alias.name,
                            in_function,
                            type_checking,
                        )
                    )
            elif isinstance(child, ast.ImportFrom):
                base = _resolve(importer, is_package, child.module, child.level)
                targets = [base]
                targets += [
                    f"{base}.{a.name}" for a in child.names if f"{base}.{a.name}" in modules
                ]
                out.append(
                    ImportSite(
                        rel,
                        child.lineno,
                        importer,
                        tuple(targets),
                        base,
                        in_function,
                        type_checking,
                    )
                )
            else:
                function = isinstance(child, (ast.FunctionDef, ast.AsyncFunctionDef, ast.Lambda))
                guarded = isinstance(child, ast.If) and _is_type_checking(child.test)
                visit(child, in_function or function, type_checking or guarded)

    visit(ast.parse(path.read_text(encoding="utf-8")), False, False)
    return out


def import_sites(root: Path, folders: tuple[str, ...]) -> list[ImportSite]:
    modules = known_modules(root, folders)
    return [site for path in modules.values() for site in sites_in_file(root, path, modules)]


def wing_of(module: str) -> str | None:
    """ "ml", "bayes" or "core" for a module of stopwise.estimation, else None."""
    for prefix, wing in ((ML, "ml"), (BAYES, "bayes"), (CORE, "core")):
        if module == prefix or module.startswith(prefix + "."):
            return wing
    return None


def wing_violations(sites: list[ImportSite]) -> list[str]:
    """Imports against core <- ml and core <- bayes: the core imports neither wing, and
    neither wing imports the other (annotation-only imports included)."""
    bad = []
    for site in sites:
        source = wing_of(site.importer)
        if source is None:
            continue
        for target in site.targets:
            wing = wing_of(target)
            if wing is not None and wing not in WINGS_ALLOWED[source]:
                bad.append(f"{site.path}:{site.line} ({source}) imports {target} ({wing})")
    return bad


def outside_violations(sites: list[ImportSite], folder: str, allowed: tuple[str, ...]) -> list[str]:
    """Imports of stopwise modules from files under ``folder`` outside the ``allowed``
    prefixes (e.g. the face, ``stopwise.*`` itself, from the engines)."""
    prefix = PACKAGE_OF_FOLDER[folder]
    bad = []
    for site in sites:
        if not (site.importer == prefix or site.importer.startswith(prefix + ".")):
            continue
        for target in site.targets:
            ours = target == "stopwise" or target.startswith("stopwise.")
            if ours and not any(target == a or target.startswith(a + ".") for a in allowed):
                bad.append(f"{site.path}:{site.line} imports {target}")
    return bad


def function_level(sites: list[ImportSite]) -> list[ImportSite]:
    return [site for site in sites if site.in_function]


def import_cycles(sites: list[ImportSite], modules: set[str]) -> list[list[str]]:
    """Circles among our modules through imports that run at import time (module level, not
    under TYPE_CHECKING): the strongly connected components with more than one module, or a
    module importing itself (Tarjan's algorithm)."""
    graph: dict[str, set[str]] = {m: set() for m in modules}
    for site in sites:
        if site.in_function or site.type_checking:
            continue
        for target in site.targets:
            if target in modules:
                graph[site.importer].add(target)
    index: dict[str, int] = {}
    low: dict[str, int] = {}
    stack: list[str] = []
    on_stack: set[str] = set()
    found: list[list[str]] = []

    def connect(v: str) -> None:
        index[v] = low[v] = len(index)
        stack.append(v)
        on_stack.add(v)
        for w in sorted(graph[v]):
            if w not in index:
                connect(w)
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
            if len(component) > 1 or v in graph[v]:
                found.append(sorted(component))

    for v in sorted(graph):
        if v not in index:
            connect(v)
    return found
