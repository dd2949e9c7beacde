"""One-file export of the worksheet functions, for a Python that cannot install packages.

Some runtimes (for example Python running inside a spreadsheet or a browser
page) offer numpy, scipy and pandas but cannot ``pip install`` this project.
:func:`write_single_file` writes one ``.py`` file that carries the sources of
:mod:`layerwise.engine` and of the plain cell functions (the bridge modules
the LW_ functions need: ``functions``, ``capital_functions``, ``cells``,
``handles``; not the headless recalculation, charts or command line). Run the
file (``exec`` it, paste it into the runtime's code cell, or ``import`` it):
it installs an import hook serving the embedded sources as the modules
``layerwise``, ``layerwise.engine...`` and ``layerwise.addin...``, then
defines every published LW_ function at its top level, with ``FUNCTIONS``
(name -> callable) and ``describe_functions()``::

    LW_PREMIUM("freqsev(poisson 5, lognormal 2e6 2.5)", 5e6, 10e6, "wang 0.4")

xlwings is not needed: without it the bridge's decorators are no-op
stand-ins that only record the metadata. The file uses the standard library
besides numpy, scipy and pandas. Running it again with the same content
reuses the modules already loaded; a file of a different content replaces
the modules of an earlier one. If a ``layerwise`` installed as a package is
already imported in the process, the file warns and uses that one.

Command line (for the project's CLI to wire in): :func:`export_main`.
"""
from __future__ import annotations

import argparse
import ast
import hashlib
import importlib.util
import os
import sys
from pathlib import Path

__all__ = ["ROOT_MODULES", "bundle_modules", "render_single_file", "write_single_file", "export_main"]

# The modules the file must provide; whatever they import from layerwise is added (see bundle_modules).
ROOT_MODULES = ("layerwise.engine", "layerwise.addin.functions")
_PACKAGE = "layerwise"


def _spec(name: str):
    try:
        return importlib.util.find_spec(name)
    except (ImportError, ValueError):
        return None


def _internal_imports(name: str, source: str, is_package: bool) -> set[str]:
    """Names of layerwise modules that ``source`` (module ``name``) may import, at any depth of its code."""
    package = name if is_package else name.rpartition(".")[0]
    found = set()
    for node in ast.walk(ast.parse(source)):
        if isinstance(node, ast.Import):
            found.update(a.name for a in node.names)
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = package
                for _ in range(node.level - 1):
                    base = base.rpartition(".")[0]
                base = f"{base}.{node.module}" if node.module else base
            else:
                base = node.module or ""
            found.add(base)
            found.update(f"{base}.{a.name}" for a in node.names)  # "from . import cells" names a module
    return {n for n in found if n == _PACKAGE or n.startswith(_PACKAGE + ".")}


def bundle_modules(roots=ROOT_MODULES) -> dict[str, tuple[str, bool]]:
    """Module name -> (source, is_package) for ``roots``, every engine module, and what they import from layerwise.

    Names are ordered (packages before their modules). The top package
    ``layerwise`` itself has no source of its own and is given as an empty one.
    """
    out: dict[str, tuple[str, bool]] = {_PACKAGE: ("", True)}
    todo = list(roots)
    engine = _spec("layerwise.engine")
    if engine is not None and engine.submodule_search_locations:
        for path in sorted(Path(next(iter(engine.submodule_search_locations))).glob("*.py")):
            if path.stem != "__init__":
                todo.append(f"layerwise.engine.{path.stem}")
    while todo:
        name = todo.pop()
        if name in out:
            continue
        spec = _spec(name)
        if spec is None or spec.origin is None or not spec.origin.endswith(".py"):
            continue  # e.g. "layerwise.engine.models.Layer" seen as a possible module: a name in a module
        source = Path(spec.origin).read_text(encoding="utf-8")
        is_package = spec.submodule_search_locations is not None
        out[name] = (source, is_package)
        parts = name.split(".")
        todo.extend(".".join(parts[:i]) for i in range(2, len(parts)))  # parent packages
        todo.extend(_internal_imports(name, source, is_package))
    return dict(sorted(out.items()))


def _literal(text: str) -> str:
    """A Python literal for ``text``: a readable raw triple-quoted string where that is exact, else repr()."""
    for quote in ("'''", '"""'):
        if quote not in text and not text.endswith(quote[0]) and not text.endswith("\\"):
            candidate = f"r{quote}{text}{quote}"
            try:
                if ast.literal_eval(candidate) == text:
                    return candidate
            except (SyntaxError, ValueError):
                pass
    return repr(text)


_HEADER = '''\
"""layerwise {version}: the published LW_ worksheet functions in one file (generated; do not edit).

Generated by layerwise.addin.export.write_single_file from the package's sources.
Needs Python >= 3.11 with numpy, scipy and pandas; not xlwings, not the layerwise package.
Running this file installs the embedded modules layerwise.engine and layerwise.addin
(an import hook over the sources below) and defines every LW_ function at top level:

    LW_PREMIUM("freqsev(poisson 5, lognormal 2e6 2.5)", 5e6, 10e6, "wang 0.4")

FUNCTIONS maps each name to its function; describe_functions() lists their arguments.
Arguments are cell-shaped (numbers, texts, lists of rows for ranges); bad input comes
back as a text error value such as "#VALUE! LW_PREMIUM(limit): ...", never an exception.
"""
'''

_INSTALLER = '''
import importlib.abc as _abc
import importlib.util as _util
import sys as _sys
import warnings as _warnings


class _LayerwiseBundle(_abc.MetaPathFinder, _abc.InspectLoader):
    """Serves the embedded sources as importable modules (tracebacks show their lines)."""

    def __init__(self, sources, packages, digest):
        self.sources, self.packages, self.digest = sources, packages, digest

    def _filename(self, fullname):
        return "<layerwise bundle>/" + fullname.replace(".", "/") + ("/__init__.py" if fullname in self.packages else ".py")

    def find_spec(self, fullname, path=None, target=None):
        if fullname not in self.sources:
            return None
        spec = _util.spec_from_loader(fullname, self, origin=self._filename(fullname), is_package=fullname in self.packages)
        spec.has_location = True  # sets __file__, so inspect and tracebacks find the lines (through get_source)
        return spec

    def is_package(self, fullname):
        return fullname in self.packages

    def get_source(self, fullname):
        if fullname not in self.sources:
            raise ImportError(f"{fullname} is not in the layerwise bundle", name=fullname)
        return self.sources[fullname]

    def get_code(self, fullname):
        return compile(self.get_source(fullname), self._filename(fullname), "exec", dont_inherit=True)


def _is_bundle(obj):
    return type(obj).__name__ == "_LayerwiseBundle"  # also the class of an earlier run of a file like this one


def _install():
    loaded = _sys.modules.get("layerwise")
    if loaded is not None:
        owner = getattr(loaded, "__loader__", None)
        if not _is_bundle(owner):
            _warnings.warn(f"layerwise is already imported from {list(getattr(loaded, '__path__', []))!r}; "
                           "its functions are used instead of this file's", RuntimeWarning, stacklevel=2)
            return
        if owner.digest == _DIGEST:
            return  # this same file ran before: keep its modules (and their caches)
        for name in [n for n in _sys.modules if n == "layerwise" or n.startswith("layerwise.")]:
            del _sys.modules[name]  # modules of an earlier, different file
    _sys.meta_path[:] = [f for f in _sys.meta_path if not _is_bundle(f)]
    _sys.meta_path.insert(0, _LayerwiseBundle(_SOURCES, _PACKAGES, _DIGEST))


_install()

from layerwise.addin import functions as _functions  # noqa: E402

FUNCTIONS = dict(_functions.FUNCTIONS)
describe_functions = _functions.describe_functions
globals().update(FUNCTIONS)
__all__ = ["FUNCTIONS", "describe_functions", *FUNCTIONS]
'''


def _version() -> str:
    try:
        from importlib.metadata import version

        return version("layerwise")
    except Exception:  # pragma: no cover - running from a source tree that is not installed
        return "(unknown version)"


def render_single_file(roots=ROOT_MODULES) -> str:
    """The text of the one-file export (deterministic: the same sources give the same text)."""
    modules = bundle_modules(roots)
    digest = hashlib.blake2b(digest_size=12)
    for name, (source, is_package) in modules.items():
        digest.update(f"{name}|{is_package}|".encode())
        digest.update(source.encode("utf-8"))
    parts = [_HEADER.format(version=_version()), "\n_SOURCES = {\n"]
    for name, (source, _) in modules.items():
        parts.append(f"    {name!r}: {_literal(source)},\n")
    parts.append("}\n")
    packages = sorted(n for n, (_, is_package) in modules.items() if is_package)
    parts.append(f"_PACKAGES = frozenset({packages!r})\n")
    parts.append(f"_DIGEST = {digest.hexdigest()!r}\n")
    parts.append(_INSTALLER)
    text = "".join(parts)
    _check(text, modules)
    return text


def _check(text: str, modules: dict) -> None:
    """The embedded literals give back exactly the sources (a guard on :func:`_literal`)."""
    tree = ast.parse(text)
    for node in tree.body:
        if isinstance(node, ast.Assign) and getattr(node.targets[0], "id", None) == "_SOURCES":
            embedded = ast.literal_eval(node.value)
            if embedded != {n: s for n, (s, _) in modules.items()}:
                raise RuntimeError("the single-file export does not reproduce the sources exactly")
            return
    raise RuntimeError("the single-file export has no _SOURCES")


def write_single_file(path) -> Path:
    """Write the one-file export to ``path`` (a file, or a folder to hold ``layerwise_functions.py``); return its path."""
    given = str(path)
    path = Path(path)
    if path.is_dir() or given.endswith(("/", os.sep)):
        path = path / "layerwise_functions.py"
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(render_single_file(), encoding="utf-8")
    return path


def export_main(argv=None) -> int:
    """``export [PATH]``: write the one-file export (default ./layerwise_functions.py) and print its path."""
    parser = argparse.ArgumentParser(
        prog="layerwise export",
        description="Write the LW_ worksheet functions and the engine as one .py file for a Python "
                    "that has numpy, scipy and pandas but cannot install packages.",
    )
    parser.add_argument("path", nargs="?", default="layerwise_functions.py",
                        help="file to write, or a folder (default: ./layerwise_functions.py)")
    args = parser.parse_args(argv)
    out = write_single_file(args.path)
    print(out)
    return 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(export_main())
