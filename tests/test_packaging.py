"""Every file the packages read at run time goes into an installed copy, not only a checkout.

setuptools puts a package's non-Python files into a wheel only when ``[tool.setuptools.
package-data]`` in pyproject.toml names them for that package (a subpackage needs its own
entry); an install made with ``pip install .`` would otherwise lack them (the live page's
templates once were). Checked against the files in the tree, each pattern globbed from its
package's folder as setuptools does (setuptools documentation, "Data Files Support", from memory).
"""
from __future__ import annotations

import tomllib
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
PACKAGES = ("predictor", "monitor", "alerts")


def test_every_data_file_is_named_in_package_data():
    data = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]["package-data"]
    missing = []
    for top in PACKAGES:
        for path in (ROOT / top).rglob("*"):
            if not path.is_file() or path.suffix in (".py", ".pyc") or "__pycache__" in path.parts:
                continue
            # the package the file belongs to: the deepest folder above it with an __init__.py
            folder = path.parent
            while not (folder / "__init__.py").exists():
                folder = folder.parent
            package = ".".join(folder.relative_to(ROOT).parts)
            # setuptools globs each pattern from the package's folder (a * stays within a folder)
            if not any(path in set(folder.glob(pattern)) for pattern in data.get(package, [])):
                missing.append(f"{package}: {path.relative_to(folder).as_posix()}")
    assert not missing, f"not in [tool.setuptools.package-data]: {missing}"
