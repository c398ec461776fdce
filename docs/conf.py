"""Sphinx configuration of the dopplerkit documentation (built with ``make docs``)."""

import os
import sys

sys.path.insert(0, os.path.abspath(".."))
import dopplerkit

project = "dopplerkit"
author = "the dopplerkit developers"
copyright = "2026, the dopplerkit developers"
release = version = dopplerkit.__version__

extensions = [
    "sphinx.ext.autodoc",
    "sphinx.ext.doctest",
    "sphinx.ext.mathjax",
    "numpydoc",
    "sphinx_gallery.gen_gallery",
]

exclude_patterns = ["_build"]
autodoc_default_options = {"members": True, "member-order": "bysource"}
autodoc_typehints = "none"  # the numpydoc Parameters sections say the types and units
numpydoc_show_class_members = False
numpydoc_class_members_toctree = False
# docstring examples (run by pytest --doctest-modules too) use their module's names
doctest_global_setup = """
import warnings
warnings.simplefilter("ignore")
from dopplerkit.kinematics import *
from dopplerkit.spectra import *
from dopplerkit.models import *
"""

html_theme = "pydata_sphinx_theme"
html_title = f"dopplerkit {release}"
html_theme_options = {"navigation_with_keys": False, "show_toc_level": 2}
html_static_path = []

sphinx_gallery_conf = {
    "examples_dirs": "../examples",
    "gallery_dirs": "gallery",
    "filename_pattern": "/plot_",
    "download_all_examples": False,
    "remove_config_comments": True,
}
