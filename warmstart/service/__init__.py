"""The team service: one process owns the archive and serves it over HTTP
(DESIGN.md section 11). Needs the ``service`` extra (FastAPI, uvicorn).

- :mod:`~warmstart.service.app`: the ASGI app (:func:`create_app`)
- :mod:`~warmstart.service.api`: the JSON API under ``/api/v1``
- :mod:`~warmstart.service.page`: the read-only web page at ``/``
- :mod:`~warmstart.service.writer`: the one writer (a transaction per write, answer after commit, request ids)
- :mod:`~warmstart.service.leases`: proposals as leases; results by trial id
- :mod:`~warmstart.service.auth`: tokens and roles
- :mod:`~warmstart.service.models`: typed request bodies
- :mod:`~warmstart.service.jobs`: gain replays in the background
"""

__all__ = ["create_app", "Tokens"]


def __getattr__(name: str):
    # loaded when first asked for: the search process imports a module of this package
    # and needs none of the web stack (1.5 s of imports at each start of it)
    if name == "create_app":
        from warmstart.service.app import create_app

        return create_app
    if name == "Tokens":
        from warmstart.service.auth import Tokens

        return Tokens
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")
