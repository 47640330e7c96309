"""`quietlayer serve`: the dashboard on a local Bokeh server."""

from __future__ import annotations

import logging
import socket
import sys
import time

CHECK_CLOSED_TABS_MS = 5000


def websocket_origins(address: str, port: int) -> list[str]:
    """Origins allowed to open the page's websocket: the address it listens on,
    and for an all-interfaces address this machine's names and addresses."""
    hosts = {address, "localhost", "127.0.0.1"} if address in ("127.0.0.1", "localhost") else {address}
    if address in ("0.0.0.0", "::", ""):
        name = socket.gethostname()
        hosts = {name, socket.getfqdn(), "localhost", "127.0.0.1"}
        try:
            hosts |= set(socket.gethostbyname_ex(name)[2])
        except OSError:
            pass
    return sorted(f"{h}:{port}" for h in hosts if h)


class ClosedTabNotice(logging.Filter):
    """Drops Bokeh's warning for a message that could not reach a closed tab:
    results still on their way when a visitor closes the page are routine, and
    one line per closed tab would bury the server's real news."""

    def filter(self, record: logging.LogRecord) -> bool:
        return "as connection was closed" not in record.getMessage()


def warm_up(preset: str) -> float:
    """Load the compiled kernels and the demo's reference before the first visitor."""
    from quietlayer.engine.measure import measure
    from .page import PAGE_PARTS, load_preset
    t = time.perf_counter()
    measure(load_preset(preset), parts=PAGE_PARTS)
    return time.perf_counter() - t


def serve(port: int = 5006, address: str = "127.0.0.1", show: bool = True, preset: str = "demo") -> int:
    from quietlayer.assets import preset_names
    from quietlayer.engine import backend

    if preset not in preset_names():
        print(f"quietlayer: --preset {preset!r} is not allowed: one of {', '.join(preset_names())}", file=sys.stderr)
        return 2
    started = time.perf_counter()

    def load():
        seconds = warm_up(preset)
        print(f"quietlayer: compiled engine in use after {time.perf_counter() - started:.1f} s "
              f"(its last load took {seconds:.1f} s)", flush=True)

    # first, so the compiling process starts while the page's libraries load; the server then
    # listens at once, and until the compiled kernels are loaded runs use their NumPy twin
    print("quietlayer: loading the compiled engine in the background (on a first start it is compiled "
          "for this machine, about half a minute; the page answers meanwhile)...", flush=True)
    backend.compile_in_background(load)

    import panel as pn

    from .page import create_page
    from .visitors import guard_link_parsing, ignore_closed_tabs

    if port == 0:
        with socket.socket() as probe:
            probe.bind((address, 0))
            port = probe.getsockname()[1]
    origins = websocket_origins(address, port)
    print(f"quietlayer: open http://{'localhost' if address in ('127.0.0.1', 'localhost') else address}:{port}/ "
          "(Ctrl-C stops)", flush=True)

    def new_session():
        ignore_closed_tabs()  # the server's event loop runs by now
        return create_page(preset)

    guard_link_parsing()
    logging.getLogger("bokeh.server.views.ws").addFilter(ClosedTabNotice())
    # a closed tab's session ends 15 s after it closed (Bokeh's default) and its workers, a sweep
    # or a 3D run, stop then; looking every 5 s rather than Bokeh's 17 s keeps them from running on for 32 s
    pn.serve({"/": new_session}, port=port, address=address, websocket_origin=origins,
             show=show, title="Quietlayer", threaded=False, verbose=False,
             check_unused_sessions_milliseconds=CHECK_CLOSED_TABS_MS)
    return 0
