"""Write one API page per public module of psiloom (run by ``conf.py`` at every build).

A module is public when no part of its dotted path starts with an underscore. A package that
defines ``__all__`` is documented with those names (its canonical place); its submodules are
documented with their remaining public names, so no object appears twice.
"""

from __future__ import annotations

import importlib
import inspect
import os
import pkgutil
import types


def package_version() -> str:
    import psiloom

    return psiloom.__version__


def public_modules() -> list[str]:
    """Dotted names of every public module of psiloom, sorted, the package itself first."""
    import psiloom

    names = ["psiloom"]
    for info in pkgutil.walk_packages(psiloom.__path__, "psiloom."):
        if any(part.startswith("_") for part in info.name.split(".")):
            continue
        names.append(info.name)
    return sorted(names, key=lambda n: (n != "psiloom", n))


def reexported(module_name: str) -> set[str]:
    """Functions and classes of ``module_name`` that its parent package lists in ``__all__``
    (documented there). Constants are documented in the module that assigns them."""
    if "." not in module_name:
        return set()
    parent = importlib.import_module(module_name.rsplit(".", 1)[0])
    module = importlib.import_module(module_name)
    names = set()
    for name in getattr(parent, "__all__", ()):
        if hasattr(module, name) and getattr(module, name) is getattr(parent, name, None):
            obj = getattr(module, name)
            if not (inspect.isclass(obj) or inspect.isroutine(obj) or hasattr(obj, "__wrapped__")):
                continue  # a constant stays where its "#:" comment is
            if getattr(obj, "__module__", None) == module_name or name in getattr(module, "__all__", ()):
                names.add(name)
    return names


def defined_elsewhere(module_name: str) -> set[str]:
    """Names in ``__all__`` of ``module_name`` whose function or class another public module
    defines outside this package (``psiloom.train`` re-exports ``psiloom.history.History``)."""
    module = importlib.import_module(module_name)
    names = set()
    for name in getattr(module, "__all__", ()):
        owner = getattr(getattr(module, name, None), "__module__", None)
        if not isinstance(owner, str) or not owner.startswith("psiloom"):
            continue
        if owner != module_name and not owner.startswith(module_name + ".") \
                and not any(part.startswith("_") for part in owner.split(".")):
            names.add(name)
    return names


def _page(module_name: str) -> str:
    title = f"``{module_name}``"
    lines = [title, "=" * len(title), "", f".. automodule:: {module_name}"]
    if module_name == "psiloom":
        lines += ["   :no-members:", ""]
        return "\n".join(lines)
    parent_name, _, last = module_name.rpartition(".")
    shadow = getattr(importlib.import_module(parent_name), last, None)
    if shadow is not None and not isinstance(shadow, types.ModuleType):
        # the package exports a name equal to this module's (psiloom.operators.pauli, the
        # function): that name owns the reference target, this page is not indexed
        lines.append("   :no-index:")
    skip = sorted(reexported(module_name) | defined_elsewhere(module_name))
    if skip:
        lines.append("   :exclude-members: " + ", ".join(skip))
    lines.append("")
    return "\n".join(lines)


def write_api_pages(directory: str) -> None:
    """(Re)write ``directory``: an index with a table of contents and one page per module."""
    os.makedirs(directory, exist_ok=True)
    for old in os.listdir(directory):
        if old.endswith(".rst"):
            os.remove(os.path.join(directory, old))
    modules = public_modules()
    for name in modules:
        with open(os.path.join(directory, f"{name}.rst"), "w", encoding="utf-8") as handle:
            handle.write(_page(name))
    index = [
        "API reference",
        "=============",
        "",
        "Generated from the docstrings of every public module. A package that lists names in",
        "``__all__`` is where those names are documented (``psiloom.states.RBM``); the page of",
        "the defining submodule shows its remaining public names.",
        "",
        ".. toctree::",
        "   :maxdepth: 1",
        "",
    ]
    index += [f"   {name}" for name in modules]
    with open(os.path.join(directory, "index.rst"), "w", encoding="utf-8") as handle:
        handle.write("\n".join(index) + "\n")
