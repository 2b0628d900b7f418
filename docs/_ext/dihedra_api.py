"""A Sphinx directive for the top of the API reference: the names ``import dihedra`` gives.

``.. dihedra-top-level::`` reads ``dihedra.__all__`` when the docs are built and writes one
summary table whose entries link to where each name is documented (the module that defines it),
so names added to ``__all__`` appear without editing the docs. A name defined in ``dihedra``
itself is documented in place, below the table; a thin wrapper there whose docstring says
``See :func:`target```  links to its target instead.
"""

import importlib
import inspect
import pkgutil
import re

from docutils import nodes
from docutils.statemachine import StringList
from sphinx.util.docutils import SphinxDirective

_SEE = re.compile(r"^\s*See :(?:func|class|meth):`~?([\w.]+)`")


def _import_dotted(path):
    """The object at a dotted path, or None."""
    parts = path.split(".")
    for cut in range(len(parts), 0, -1):
        try:
            obj = importlib.import_module(".".join(parts[:cut]))
        except ImportError:
            continue
        try:
            for attr in parts[cut:]:
                obj = getattr(obj, attr)
        except AttributeError:
            return None
        return obj
    return None


def _defined_in_subpackage(package, name):
    """Dotted path of a public function or class ``name`` defined in a module below ``package``."""
    for info in pkgutil.walk_packages(package.__path__, package.__name__ + "."):
        if any(part.startswith("_") for part in info.name.split(".")):
            continue
        try:
            module = importlib.import_module(info.name)
        except Exception:  # a module that needs an optional extra
            continue
        obj = getattr(module, name, None)
        if obj is not None and getattr(obj, "__module__", None) == info.name:
            return f"{info.name}.{name}"
    return None


def canonical_path(package, name):
    """Where ``package.name`` is documented: (dotted path, documented in place?)."""
    obj = getattr(package, name)
    module = getattr(obj, "__module__", None)
    if module and module != package.__name__ and (inspect.isclass(obj) or callable(obj)):
        return f"{module}.{obj.__qualname__}", False
    match = _SEE.match(inspect.getdoc(obj) or "")
    if match:
        target = match.group(1)
        if _import_dotted(target) is not None and not inspect.ismodule(_import_dotted(target)):
            return target, False
        found = _defined_in_subpackage(package, name)
        if found:
            return found, False
    return f"{package.__name__}.{name}", True


class TopLevel(SphinxDirective):
    """Summary table of ``dihedra.__all__`` with links to each name's documentation."""

    has_content = False

    def run(self):
        package = importlib.import_module("dihedra")
        rows, in_place = [], []
        for name in sorted(package.__all__, key=str.lower):
            if name.startswith("__"):   # __version__ and the like: not API to call
                continue
            path, here = canonical_path(package, name)
            rows.append(f"   ~{path}")
            if here:
                in_place.append(path)
        lines = [".. autosummary::", "   :nosignatures:", ""] + rows + [""]
        for path in in_place:
            kind = "autoclass" if inspect.isclass(_import_dotted(path)) else "autofunction"
            lines += [f".. {kind}:: {path}", ""]
        container = nodes.container()
        self.state.nested_parse(StringList(lines, source="dihedra.__all__"), self.content_offset,
                                container)
        return container.children


def setup(app):
    app.add_directive("dihedra-top-level", TopLevel)
    return {"parallel_read_safe": True, "parallel_write_safe": True}
