"""The optional C kernel of recursive/ (everything else is declared in pyproject.toml).

``optional=True``: without a C compiler the install goes on and the pure numpy path is used.
"""

import warnings

from setuptools import Extension, setup

# `pip install -e .` from the checkout: setuptools prints an information-only note that
# folders named like the packages may shadow them, which is the point of an editable
# install; only that note is silenced (categories and messages of real warnings stay).
warnings.filterwarnings("ignore", message="Editable installation", module="setuptools")
try:
    from setuptools.warnings import InformationOnly

    warnings.filterwarnings("ignore", message="Editable installation", category=InformationOnly)
except ImportError:  # older setuptools have neither the note nor the class
    pass

setup(ext_modules=[Extension("recursive._kernel", ["recursive/_kernel.c"], optional=True)])
