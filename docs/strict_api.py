"""Sphinx extension that makes the API reference strict.

* Every public name must have a docstring: the functions and classes of each public module (its
  ``__all__``, or else what it defines without a leading underscore), their public methods and
  properties, and the constants in ``__all__`` (documented by a ``#:`` comment where they are
  assigned). A missing one is a warning, so ``sphinx -W`` fails.
* A reference written against the defining submodule (``psiloom.states.rbm.RBM``) or produced by
  a type annotation resolves to where the object is documented (``psiloom.states.RBM``).
* A constant listed in a package's ``__all__`` is documented in the submodule that assigns it
  (with its ``#:`` comment); references through the package resolve there.
"""

from __future__ import annotations

import importlib
import inspect
import re

from sphinx.pycode import ModuleAnalyzer
from sphinx.util import logging

import api_pages

logger = logging.getLogger(__name__)


def _is_routine_or_class(obj) -> bool:
    return inspect.isclass(obj) or inspect.isroutine(obj) or callable(obj) and hasattr(obj, "__wrapped__")


def _attribute_docs() -> dict[str, list[str]]:
    """``#:`` comments of module-level assignments in every public module, by name."""
    docs: dict[str, list[str]] = {}
    for module_name in api_pages.public_modules():
        try:
            attr_docs = ModuleAnalyzer.for_module(module_name).find_attr_docs()
        except Exception:  # pragma: no cover - a module without source
            continue
        for (scope, name), lines in attr_docs.items():
            if scope == "" and any(line.strip() for line in lines):
                docs.setdefault(name, list(lines))
    return docs


_ATTR_DOCS: dict[str, list[str]] | None = None


def attribute_docs() -> dict[str, list[str]]:
    global _ATTR_DOCS
    if _ATTR_DOCS is None:
        _ATTR_DOCS = _attribute_docs()
    return _ATTR_DOCS


def public_names(module_name: str) -> list[str]:
    module = importlib.import_module(module_name)
    names = getattr(module, "__all__", None)
    if names is not None:
        return [n for n in names if not inspect.ismodule(getattr(module, n, None))]
    return [n for n, obj in vars(module).items()
            if not n.startswith("_") and getattr(obj, "__module__", None) == module_name
            and _is_routine_or_class(obj)]


def _own_public_members(cls) -> list[tuple[str, object]]:
    members = []
    for name, value in vars(cls).items():
        if name.startswith("_"):
            continue
        if isinstance(value, (staticmethod, classmethod)):
            value = value.__func__
        if inspect.isfunction(value) or isinstance(value, property):
            members.append((name, value))
    return members


def _inherited_doc(cls, name) -> bool:
    for base in cls.__mro__[1:]:
        if name in vars(base):
            value = vars(base)[name]
            if isinstance(value, (staticmethod, classmethod)):
                value = value.__func__
            if getattr(value, "__doc__", None):
                return True
    return False


def check_docstrings(app) -> None:
    """Warn once for every public name without a docstring."""
    seen: set[int] = set()
    for module_name in api_pages.public_modules():
        module = importlib.import_module(module_name)
        if not (module.__doc__ or "").strip():
            logger.warning("public module %s has no docstring", module_name)
        for name in public_names(module_name):
            if not hasattr(module, name):
                logger.warning("%s.__all__ names %r, which the module lacks", module_name, name)
                continue
            obj = getattr(module, name)
            if _is_routine_or_class(obj):
                if id(obj) in seen:
                    continue
                seen.add(id(obj))
                doc = obj.__doc__ or ""
                if inspect.isclass(obj) and _generated_doc(obj):
                    doc = ""
                if not doc.strip():
                    logger.warning("public name %s.%s has no docstring", module_name, name)
                if inspect.isclass(obj) and getattr(obj, "__module__", "").startswith("psiloom"):
                    for member, value in _own_public_members(obj):
                        if not (getattr(value, "__doc__", None) or "").strip() and not _inherited_doc(obj, member):
                            logger.warning("public name %s.%s.%s has no docstring", module_name, name, member)
            elif name not in attribute_docs():
                logger.warning("public constant %s.%s has no '#:' comment where it is assigned", module_name, name)


def _generated_doc(cls) -> bool:
    """True when the class docstring is one Python wrote (NamedTuple, dataclass signatures)."""
    doc = (cls.__doc__ or "").strip()
    return doc.startswith(cls.__name__ + "(") and doc.endswith(")") and "\n" not in doc


def skip_member(app, what, name, obj, skip, options):
    if what == "module" and inspect.ismodule(obj):
        return True  # submodules have their own pages
    return None


_FIELD = re.compile(r"^(\s*:(?:ivar|cvar|var|param|parameter|arg|argument|keyword|kwarg) )([^:`]+?)(:.*)$")
_LITERAL = re.compile(r"(``.*?``)")


def escape_bars(lines: list[str]) -> None:
    """Docstrings write moduli as plain text (``|ψ|²``, ``log|ψ|``), which reST would read as
    substitution references: escape every ``|`` outside inline literals and literal blocks."""
    block_indent = None
    for i, line in enumerate(lines):
        indent = len(line) - len(line.lstrip())
        if block_indent is not None:
            if line.strip() and indent <= block_indent:
                block_indent = None
            else:
                continue
        if line.lstrip().startswith((">>>", "... ")):
            continue
        parts = _LITERAL.split(line)
        lines[i] = "".join(part if part.startswith("``") else part.replace("|", "\\|") for part in parts)
        if line.rstrip().endswith("::"):
            block_indent = indent


def process_docstring(app, what, name, obj, options, lines):
    escape_bars(lines)
    if what in ("data", "attribute") and not any(line.strip() for line in lines):
        short = name.rsplit(".", 1)[-1]
        if short in attribute_docs():
            lines[:] = list(attribute_docs()[short]) + [""]
    for i, line in enumerate(lines):
        # napoleon turns "a / b: text" and "a, b: text" entries into ":ivar a / b:", which
        # Sphinx would read as a type "a /" and a name "b": keep the names as one word
        field = _FIELD.match(line)
        if field and " " in field.group(2).strip():
            lines[i] = field.group(1) + re.sub(r"\s*([/,])\s*", r"\1", field.group(2).strip()) + field.group(3)
    if what == "class" and inspect.isclass(obj) and _generated_doc(obj):
        lines[:] = []


_CANONICAL: dict[int, str] | None = None


def _canonical(env) -> dict[int, str]:
    global _CANONICAL
    if _CANONICAL is None:
        _CANONICAL = {}
        for full_name in sorted(env.get_domain("py").objects):
            obj = _import(full_name)
            if obj is not None and _is_routine_or_class(obj):
                _CANONICAL.setdefault(id(obj), full_name)
    return _CANONICAL


def _import(path: str):
    parts = path.split(".")
    for cut in range(len(parts), 0, -1):
        try:
            obj = importlib.import_module(".".join(parts[:cut]))
        except Exception:
            continue
        try:
            for attr in parts[cut:]:
                obj = getattr(obj, attr)
        except AttributeError:
            return None
        return obj
    return None


def missing_reference(app, env, node, contnode):
    if node.get("refdomain") != "py":
        return None
    target = node.get("reftarget", "")
    candidates = [target]
    module = node.get("py:module")
    if module and not target.startswith("psiloom"):
        candidates.append(f"{module}.{target}")
    for candidate in candidates:
        if not candidate.startswith("psiloom"):
            continue
        obj = _import(candidate)
        if obj is None:
            continue
        full = _canonical(env).get(id(obj))
        if full is None and inspect.ismodule(obj):
            full = obj.__name__
        if full is None or full == target:
            continue
        domain = env.get_domain("py")
        for role in (node.get("reftype"), "obj"):
            found = domain.resolve_xref(env, node.get("refdoc", ""), app.builder, role, full, node, contnode)
            if found is not None:
                return found
    # a short name used in a docstring of a package's page for a name that one of the package's
    # modules documents (``:func:`infinite_temperature_energy``` in psiloom.operators)
    # a constant is documented where its "#:" comment is (psiloom.electrons.system.BOHR_PER_ANGSTROM);
    # a reference to it through the package (psiloom.electrons.BOHR_PER_ANGSTROM) resolves there
    if target.startswith("psiloom.") and _import(target) is not None:
        module, target = target.rsplit(".", 1)
    if "." not in target and module:
        names = env.get_domain("py").objects
        parts = module.split(".")
        for cut in range(len(parts), 0, -1):
            prefix = ".".join(parts[:cut]) + "."
            found = [n for n, entry in names.items() if n.startswith(prefix) and n.endswith("." + target)
                     and not getattr(entry, "aliased", False)]
            if len(found) == 1:
                domain = env.get_domain("py")
                return domain.resolve_xref(env, node.get("refdoc", ""), app.builder, "obj", found[0], node, contnode)
            if found:
                break
    return None


def setup(app):
    app.connect("builder-inited", check_docstrings)
    app.connect("autodoc-skip-member", skip_member)
    app.connect("autodoc-process-docstring", process_docstring)
    app.connect("missing-reference", missing_reference)
    return {"parallel_read_safe": True, "parallel_write_safe": True}
