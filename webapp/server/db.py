"""The store on Flask's ``g``: one connection per request, closed at teardown."""

from flask import current_app, g

__all__ = ["get_db", "close_db", "init_db", "state"]


def state():
    """The app's :class:`webapp.server.State` (store, pool, caches)."""
    return current_app.extensions["rateferry"]


def get_db():
    """The request's :class:`webapp.store.Db` (opened on first use)."""
    if "db" not in g:
        g.db = state().store.open()
    return g.db


def close_db(exc=None):
    db = g.pop("db", None)
    if db is not None:
        db.close()


def init_db(app):
    app.teardown_appcontext(close_db)
