"""Connection strings: one helper shared by the demo, the catalog mirror and the tests."""

from __future__ import annotations

from urllib.parse import urlsplit, urlunsplit

from psycopg.conninfo import conninfo_to_dict, make_conninfo


def with_database(dsn: str, name: str) -> str:
    """``dsn`` pointing at database ``name`` on the same server, keeping the URL form when it was
    a URL (so printed commands stay readable)."""
    if "://" in dsn:
        parts = urlsplit(dsn)
        return urlunsplit(parts._replace(path=f"/{name}"))
    params = conninfo_to_dict(dsn)
    params["dbname"] = name
    return make_conninfo(**params)
