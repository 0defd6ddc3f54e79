"""The sub-commands of the ``saedkit`` command line, one module each.

Each module has ``register(subparsers)``, which adds its parser and sets
``func`` to a function that takes the parsed arguments and returns
``(record, text)``: the JSON record and the human-readable summary (or an
exit status). Modules import the heavy parts of saedkit inside ``func`` so
that ``--help`` stays fast and the non-GUI commands never import Qt.
"""

import importlib

# the order in which `saedkit --help` lists them
_ORDER = ["gui", "phases", "rings", "spots", "calibrate", "calibrations", "index", "identify",
          "tiltpair", "report", "batch", "series", "demo"]


def _load():
    modules = []
    for name in _ORDER:
        try:
            modules.append(importlib.import_module(f"{__name__}.{name}"))
        except ModuleNotFoundError as exc:
            if exc.name != f"{__name__}.{name}":
                raise
    return modules


COMMAND_MODULES = _load()
