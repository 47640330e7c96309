"""What a served page must bear from visitors it does not know: links with
hostile query strings, and tabs closed while results are on their way.

serve.py installs both before the server starts.  The page's own controls, uploads and work budget
(engine.budget.VISITOR_BUDGET) take care of the values themselves.
"""

from __future__ import annotations

import asyncio
from urllib.parse import parse_qsl, urlencode

MAX_QUERY_VALUE = 200  # characters: a control's value in a link is a few dozen at most
MAX_QUERY_KEYS = 64  # the page has about 20 controls in its link


def screened_query(query: str) -> str:
    """A link's query string ('?a=1&b=2') with at most MAX_QUERY_KEYS keys and
    every key and value cut to MAX_QUERY_VALUE characters (a cut value ends in
    '...', so it is no number: the control it names refuses it with the
    page's usual message, or keeps its value)."""
    pairs = parse_qsl(query[1:] if query.startswith("?") else query, keep_blank_values=True)
    screened = [(key[:MAX_QUERY_VALUE], value if len(value) <= MAX_QUERY_VALUE else value[:MAX_QUERY_VALUE] + "...")
                for key, value in pairs[:MAX_QUERY_KEYS]]
    return "?" + urlencode(screened) if screened else ""


def guard_link_parsing() -> None:
    """Panel turns a link's digits into a Python int, which fails beyond 4,300
    digits (and the session, or its callback, with it), both when a session
    starts and whenever the browser reports its address: its parser gets the
    screened query instead."""
    from panel.io import location
    if getattr(location.parse_query, "quietlayer", False):
        return
    parse = location.parse_query

    def parse_screened(query: str) -> dict:
        return parse(screened_query(query))
    parse_screened.quietlayer = True
    location.parse_query = parse_screened


def _closed_tab(context: dict) -> bool:
    """A message the server could not send because the visitor's tab was
    closed meanwhile: routine for a page that sends results as they come."""
    from tornado.iostream import StreamClosedError
    from tornado.websocket import WebSocketClosedError
    return isinstance(context.get("exception"), (WebSocketClosedError, StreamClosedError))


def ignore_closed_tabs() -> None:
    """Keep closed tabs out of the server's log (tornado reports each unsent
    message as an unretrieved task exception); everything else is reported
    as before."""
    loop = asyncio.get_running_loop()
    previous = loop.get_exception_handler()
    if getattr(previous, "quietlayer", False):
        return

    def handler(loop, context):
        if _closed_tab(context):
            return
        if previous is not None:
            previous(loop, context)
        else:
            loop.default_exception_handler(context)
    handler.quietlayer = True
    loop.set_exception_handler(handler)
