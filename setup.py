"""Packaging: the metadata is in pyproject.toml; this file only maps the repository's top-level
``static/`` and ``demo_media/`` folders into the wheel as ``webapp/static`` and
``webapp/demo_media`` (they keep their places in the repository; see webapp/assets.py)."""

from setuptools import find_packages, setup

EXTRA = {"webapp.static": "static", "webapp.demo_media": "demo_media"}

setup(
    packages=find_packages(include=["webapp", "webapp.*"]) + sorted(EXTRA),
    package_dir=EXTRA,
    package_data={
        "webapp": ["schemas/*.json", "server/templates/*.html", "server/*.md", "server/*.json",
                   "sheet_assets/*"],
        "webapp.static": ["*", "**/*"],
        "webapp.demo_media": ["*"],
    },
    include_package_data=False,
)
