"""Maps the top-level folders onto one importable package: pipeline/ -> coreach, plugins/ -> coreach.plugins,
conf/ -> coreach.conf (YAML shipped as package data so Hydra finds it in any install)."""

from setuptools import find_packages, setup

MAP = {"coreach": "pipeline", "coreach.plugins": "plugins", "coreach.conf": "conf"}

packages = []
for name, folder in MAP.items():
    packages.append(name)
    packages += [f"{name}.{sub}" for sub in find_packages(folder)]

setup(
    package_dir=MAP,
    packages=packages,
    package_data={"coreach.conf": ["**/*.yaml"], "coreach.plugins": ["**/*.urdf"]},
)
