"""The static import graph of the `pipeline` package: which package modules a piece of code runs.

Reads the package's source files with `ast` and never imports them, so computing a closure loads neither
torch nor MLflow (the Snakefile does it at every invocation). Writes nothing; obeys no config key.

Every import statement counts, including the ones inside functions (the package defers heavy imports
into the functions that need them, and that code still runs in the job). Importing `pipeline.a.b` also
runs `pipeline/__init__.py` and `pipeline/a/__init__.py`, so parent packages are edges too. Imports
outside the package are kept apart as top-level names (`torch`, `numpy`, ...): they say which third-party
libraries a stage depends on.

Model families are plug-ins: the registry `pipeline.models` imports every family module, but a job runs
only its own families. `family_modules` finds, statically, the module defining each family (a class
with a class attribute `family = "<name>"` under `models/`), and callers prune the other families'
modules from a closure.
"""

from __future__ import annotations

import ast
from dataclasses import dataclass
from pathlib import Path

from pipeline.errors import InputError

PACKAGE = "pipeline"


@dataclass(frozen=True)
class ModuleImports:
    internal: frozenset[str]  # package modules this file imports (dotted names, parents included)
    external: frozenset[str]  # top-level names of other imported libraries (torch, numpy, ...)


def module_name(package_dir: Path, path: Path) -> str:
    """pipeline/models/base.py -> pipeline.models.base; a package's __init__.py -> the package."""
    parts = list(path.relative_to(package_dir).with_suffix("").parts)
    if parts[-1] == "__init__":
        parts.pop()
    return ".".join([PACKAGE, *parts])


def module_file(package_dir: Path, name: str) -> Path | None:
    """The source file of a dotted package module name, or None when it is not a module of the package."""
    parts = name.split(".")
    if parts[0] != PACKAGE:
        return None
    base = package_dir.joinpath(*parts[1:])
    for candidate in (base.with_suffix(".py"), base / "__init__.py"):
        if candidate.is_file():
            return candidate
    return None


def _with_parents(name: str) -> set[str]:
    parts = name.split(".")
    return {".".join(parts[:i]) for i in range(1, len(parts) + 1)}


def _resolve_relative(current: str, is_package: bool, level: int, module: str | None) -> str:
    base = current.split(".") if is_package else current.split(".")[:-1]
    base = base[:len(base) - (level - 1)] if level > 1 else base
    return ".".join([*base, module] if module else base)


def parse_imports(package_dir: Path, path: Path) -> ModuleImports:
    """The imports of one source file; a file that does not parse is bad input (file and line named)."""
    try:
        tree = ast.parse(path.read_bytes(), filename=str(path))
    except SyntaxError as error:
        raise InputError(f"does not parse: {error.msg}", file=str(path), row=error.lineno,
                         field="import graph") from None
    current = module_name(package_dir, path)
    internal, external = set(), set()

    def add(name: str) -> None:
        if name.split(".")[0] == PACKAGE:
            internal.update(n for n in _with_parents(name) if module_file(package_dir, n))
        else:
            external.add(name.split(".")[0])

    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                add(alias.name)
        elif isinstance(node, ast.ImportFrom):
            source = (_resolve_relative(current, path.name == "__init__.py", node.level, node.module)
                      if node.level else node.module or "")
            add(source)
            for alias in node.names:  # `from pipeline import selection`: a submodule, not an attribute
                if source.split(".")[0] == PACKAGE and module_file(package_dir, f"{source}.{alias.name}"):
                    add(f"{source}.{alias.name}")
    internal.discard(current)
    return ModuleImports(frozenset(internal), frozenset(external))


class ImportGraph:
    """Edges of every module of one package folder, parsed once per file version (path, size, mtime)."""

    def __init__(self, package_dir: Path | str):
        self.package_dir = Path(package_dir).resolve()
        self._parsed: dict[Path, tuple[tuple[int, int], ModuleImports]] = {}
        self._families: dict[Path, tuple[tuple[int, int], tuple[str, ...]]] = {}

    def imports(self, name: str) -> ModuleImports:
        path = module_file(self.package_dir, name)
        if path is None:
            raise InputError(f"no module {name} in {self.package_dir}", field="import graph")
        stat = path.stat()
        key = (stat.st_size, stat.st_mtime_ns)
        cached = self._parsed.get(path)
        if cached is None or cached[0] != key:
            cached = (key, parse_imports(self.package_dir, path))
            self._parsed[path] = cached
        return cached[1]

    def closure(self, roots: list[str], prune: set[str] | frozenset[str] = frozenset()) -> set[str]:
        """Every package module reachable from `roots` (included) without entering a `prune` module."""
        seen, stack = set(), [r for r in roots if r not in prune]
        while stack:
            name = stack.pop()
            if name in seen:
                continue
            seen.add(name)
            stack.extend(n for n in self.imports(name).internal if n not in seen and n not in prune)
        return seen

    def external(self, modules: set[str]) -> set[str]:
        """Top-level names of the libraries outside the package that these modules import."""
        return {name for module in modules for name in self.imports(module).external}

    def files(self, modules: set[str]) -> list[Path]:
        return sorted(module_file(self.package_dir, m) for m in modules)

    def family_modules(self) -> dict[str, str]:
        """Model family name -> the module defining its class (found in the source, nothing imported)."""
        found = {}
        for path in sorted((self.package_dir / "models").glob("*.py")):
            found.update(dict.fromkeys(self._families_defined(path), module_name(self.package_dir, path)))
        return found

    def _families_defined(self, path: Path) -> tuple[str, ...]:
        """The family names one file's classes declare, parsed once per file version (a job asks for
        every run it logs)."""
        stat = path.stat()
        key = (stat.st_size, stat.st_mtime_ns)
        cached = self._families.get(path)
        if cached is None or cached[0] != key:
            cached = (key, tuple(_declared_families(ast.parse(path.read_bytes(), filename=str(path)))))
            self._families[path] = cached
        return cached[1]


def _declared_families(tree: ast.AST):
    """Values of class attributes `family = "<name>"` in a parsed module."""
    for node in ast.walk(tree):
        if not isinstance(node, ast.ClassDef):
            continue
        for statement in node.body:
            if (isinstance(statement, ast.Assign) and len(statement.targets) == 1
                    and isinstance(statement.targets[0], ast.Name) and statement.targets[0].id == "family"
                    and isinstance(statement.value, ast.Constant) and isinstance(statement.value.value, str)):
                yield statement.value.value
