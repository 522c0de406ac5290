"""HTTP, server-sent events, the broadcast overlay page and the analysts' live board.

``streamrate web`` runs :class:`streamrate.web.server.WebServer`: a Starlette
application on uvicorn that is one Redis client of the service (pairing
questions and one watch for the whole process, :mod:`streamrate.web.feed`),
fans the live odds out to browsers (:mod:`streamrate.web.hub`) and serves the
static pages in ``static/`` (:mod:`streamrate.web.app`).
"""
