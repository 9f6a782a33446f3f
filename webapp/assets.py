"""Where the page's files and the demo recordings are, in a source tree and in an installed wheel.

In the repository ``static/`` and ``demo_media/`` sit at the top level (beside ``webapp/``); the
wheel ships them inside the package as ``webapp/static`` and ``webapp/demo_media`` (see
``setup.py``). The folder inside the package wins when it exists.
"""

import os

__all__ = ["asset_folder", "STATIC_FOLDER", "DEMO_MEDIA_FOLDER"]

_PACKAGE = os.path.dirname(os.path.abspath(__file__))


def asset_folder(name):
    """The folder ``name`` ("static" or "demo_media"): inside the installed package, or at the
    top of the source tree."""
    inside = os.path.join(_PACKAGE, name)
    if os.path.isdir(inside):
        return inside
    return os.path.join(os.path.dirname(_PACKAGE), name)


STATIC_FOLDER = asset_folder("static")
DEMO_MEDIA_FOLDER = asset_folder("demo_media")
