"""Package mapping only: every top-level folder imports as ``hilrig.<folder>``.

``hilrig`` itself is an implicit namespace package (no ``hilrig/`` folder), so the repository
keeps the fixed top-level layout (runtime/, plugins/, bridge/, safety/) and nothing imports as a
bare ``runtime`` or ``safety``.
"""
from setuptools import find_packages, setup

TOPS = ["runtime", "plugins", "bridge", "safety"]
package_dir, packages = {}, []
for top in TOPS:
    package_dir[f"hilrig.{top}"] = top
    packages += [f"hilrig.{top}"] + [f"hilrig.{top}.{p}" for p in find_packages(top)]

setup(package_dir=package_dir, packages=packages)
