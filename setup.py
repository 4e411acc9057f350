"""Package discovery only (metadata lives in pyproject.toml): the folder plugins/ installs as
the package ``annotator_plugins``, beside ``annotator``."""

from setuptools import find_packages, setup

packages = find_packages(include=["annotator", "annotator.*"])
packages += ["annotator_plugins"] + [
    "annotator_plugins." + p for p in find_packages("plugins")
]
setup(packages=packages, package_dir={"annotator_plugins": "plugins"},
      package_data={"annotator": ["py.typed", "service/templates/*.html", "service/static/*"], "annotator_plugins": ["**/*.csv", "**/*.toml"]})
