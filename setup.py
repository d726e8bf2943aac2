"""Install the top-level ``resources/`` folder as the package ``passivefit.resources``.

pyproject.toml's ``[tool.setuptools.packages.find]`` lists the packages under passivefit/;
it cannot see a folder outside them, so this adds the one mapped there by ``package-dir``.
"""

from setuptools import setup
from setuptools.dist import Distribution


class _WithResources(Distribution):
    def parse_config_files(self, *args, **kwargs):
        super().parse_config_files(*args, **kwargs)  # runs packages.find
        if "passivefit.resources" not in self.packages:
            self.packages.append("passivefit.resources")


setup(distclass=_WithResources)
