"""Import every module that defines tables on :data:`server.storage.tables.Base`.

Alembic's env.py and the test helpers import this module so ``Base.metadata`` is complete. A part
that adds tables lists its module in ``TABLE_MODULES``; a module that is not there (yet) is skipped.
"""

from __future__ import annotations

import importlib
import importlib.util

from server.storage.tables import Base

TABLE_MODULES = (
    "server.storage.tables",
    "server.alarms.tables",
)


def _discovered() -> list[str]:
    """``server.<package>.tables`` for every package under ``server/`` that has one."""
    import pkgutil

    import server

    return [
        f"server.{info.name}.tables"
        for info in pkgutil.iter_modules(server.__path__)
        if info.ispkg and importlib.util.find_spec(f"server.{info.name}.tables") is not None
    ]


def load() -> type[Base]:
    for name in dict.fromkeys([*TABLE_MODULES, *_discovered()]):
        try:
            importlib.import_module(name)
        except ModuleNotFoundError as exc:
            if exc.name != name:
                raise
    return Base


load()
metadata = Base.metadata
