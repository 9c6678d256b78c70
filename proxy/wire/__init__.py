"""The PostgreSQL wire front: analysts connect with the SQL clients they already use.

Layers, data flowing one way: ``codec`` (bytes <-> typed messages, no I/O) -> ``states`` (the
connection and transaction state tables) -> ``session`` (settings, prepared statements, portals;
calls the engine) -> ``server`` (asyncio sockets). ``types`` encodes values, ``auth`` does
SCRAM-SHA-256, ``statements`` splits and recognises statements, ``settings`` lists what SET
accepts, ``catalog`` answers catalog questions from data-free mirror databases. Entry points for the command line: ``serve``, ``run_server``, ``start_in_thread``.
"""

from __future__ import annotations

from typing import Any

__all__ = ["serve", "run_server", "start_in_thread", "WireServer"]


def __getattr__(name: str) -> Any:
    # Lazy, so ``import proxy.wire.codec`` does not pull in the engine and its database driver.
    if name in __all__:
        from proxy.wire import server
        return getattr(server, name)
    raise AttributeError(name)
