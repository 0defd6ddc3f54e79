"""The sub-commands of the ``saedkit`` command line, one module each.

Each module has ``register(subparsers)``, which adds its parser and sets
``func`` to a function that takes the parsed arguments and returns
``(record, text)``: the JSON record and the human-readable summary. Modules
import the heavy parts of saedkit inside ``func`` so that ``--help`` stays fast.
"""

from . import phases

COMMAND_MODULES = [phases]
