"""Sphinx configuration of psiloom's documentation (MyST pages + API pages generated from docstrings).

Build (warnings are errors, as in CI):

    python -m sphinx -W --keep-going -b html docs docs/_build/html

The API pages are written at build time by ``api_pages.py`` from the installed package, so every
public module (a module path without a leading underscore) is documented, including subpackages
added later. ``strict_api.py`` turns a public name without a docstring into a warning (and so an
error under ``-W``) and resolves references written against a defining submodule
(``psiloom.states.rbm.RBM``) to the place where the name is documented (``psiloom.states.RBM``).
"""

import os
import sys

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)
sys.path.insert(0, os.path.join(HERE, "..", "src"))

import api_pages  # noqa: E402

project = "psiloom"
author = "The psiloom authors"
copyright = "the psiloom authors; Apache-2.0"
release = api_pages.package_version()
version = release

extensions = [
    "myst_parser",
    "sphinx.ext.autodoc",
    "sphinx.ext.napoleon",
    "sphinx.ext.mathjax",
    "strict_api",
]

source_suffix = {".md": "markdown", ".rst": "restructuredtext"}
exclude_patterns = ["_build", "README.md"]
myst_enable_extensions = ["dollarmath", "colon_fence"]
myst_heading_anchors = 3

# Every unresolved cross-reference into psiloom is a warning (an error under -W). References to
# other libraries' objects (numpy, jax, flax, optax, the standard library) are not resolved: no
# inventory is fetched, since the build must work without network access.
nitpicky = True
_BUILTINS = ("int|float|complex|bool|str|bytes|object|None|type|tuple|list|dict|set|frozenset|slice|"
             "Ellipsis|NotImplemented|callable|Exception|ValueError|TypeError|FloatingPointError|"
             "RuntimeError|OSError|KeyError|IndexError|AttributeError")
nitpick_ignore_regex = [
    (r"py:.*", r"(?!psiloom\.)[A-Za-z_]\w*\..+"),  # dotted names outside psiloom (jax.Array, numpy.ndarray)
    (r"py:.*", rf"({_BUILTINS})(\[.*)?"),  # builtins (and the head of a generic, dict[str, int])
]

autodoc_default_options = {"members": True, "show-inheritance": True, "member-order": "bysource"}
autodoc_typehints = "signature"
autodoc_typehints_format = "short"
autodoc_preserve_defaults = True
autodoc_inherit_docstrings = False
autodoc_class_signature = "mixed"
napoleon_google_docstring = True
napoleon_numpy_docstring = False
napoleon_use_rtype = False
napoleon_use_ivar = True
napoleon_use_param = False  # 'a / b: ...' and 'a, b: ...' entries stay names, not types

html_theme = "alabaster"
html_title = f"psiloom {release}"
html_static_path = []

api_pages.write_api_pages(os.path.join(HERE, "api"))
