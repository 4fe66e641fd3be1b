"""The dashboard shown inline in a notebook: what Panel sends to the page goes through :class:`NotebookOutput`.

It makes good two shortfalls of Panel 1.9 in a notebook (style sheets referenced on Panel's CDN after the first
render; changes lost while the page has not opened its comm yet). It reads some of Panel's and pyviz_comms'
private attributes, so it is checked again on every Panel upgrade (``tests/test_notebooks_lab.py`` fails when a
request leaves the machine or a change does not reach the page).
"""

from __future__ import annotations

import functools
import threading

import panel as pn


class NotebookOutput:
    """The comm of one dashboard shown inline in a notebook: what Panel sends to the page goes through here.

    Two shortfalls of Panel 1.9 in a notebook are made good:

    * Panel inlines its own style sheets only in the output's first render; panes updated or created later (the
      status line, the summary, the fit table...) reference them on Panel's CDN, so the page would fetch them from
      outside the machine. Here each such reference becomes an inline style sheet read from the installed Panel.
    * Until the page opens its comm (after the cells queued by a "Run All" have run), Panel retries a change on
      the current thread's event loop, which never runs in a fit's background thread: the change was lost and the
      page kept showing an older state. Here changes wait, in order, until the comm is open.
    """

    def __init__(self, comm):
        self._comm = comm
        self._real = None
        self._waiting = []  # parts of messages to send once the comm is open, in order
        self._partial: dict = {}  # the parts of a message a thread is sending
        self._lock = threading.Lock()

    @classmethod
    def attach(cls, layout, bundle):
        """Route the comm of ``layout``'s notebook output (just rendered into ``bundle``) through a new gate."""
        from panel.io.notebook import EXEC_MIME

        meta = bundle[1] if isinstance(bundle, tuple) and len(bundle) == 2 else {}
        ref = (meta.get(EXEC_MIME) or {}).get("id")
        view = pn.state._views.get(ref)
        comm = view[3] if view is not None else None
        if comm is None or not hasattr(comm, "init"):
            return None  # not a Jupyter comm (an embedded or exported output): nothing is sent later
        gate = cls(comm)
        comm.init = gate.open  # called when the page opens its side of the comm
        comm._comm = gate  # Panel sends through the gate from now on, open or not, from any thread
        return gate

    def open(self):
        """The page opened its side: open ours (as ``pyviz_comms.JupyterComm.init``), then send what waited."""
        from ipykernel.comm import Comm as KernelComm

        with self._lock:
            if self._real is not None:
                return
            self._real = KernelComm(target_name=self._comm.id, data={})
            self._real.on_msg(self._comm._handle_msg)
            for data, metadata, buffers in self._waiting:
                self._real.send(data, metadata=metadata, buffers=buffers)
            self._waiting = []
        if self._comm._on_open:
            self._comm._on_open({})

    def send(self, data=None, metadata=None, buffers=None):
        """One part of a message: Panel sends a Bokeh message as its header, metadata, content and two parts per
        binary buffer. A message's parts go out together, so that messages sent from two threads (a cell and a
        background fit) do not interleave."""
        part = (_inline_panel_css(data), metadata, buffers or [])
        thread = threading.get_ident()
        with self._lock:
            message = self._partial.pop(thread, None)
            if message is None:
                message = {"parts": [], "count": _message_parts(data)}
            message["parts"].append(part)
            if len(message["parts"]) < message["count"]:
                self._partial[thread] = message
                return
            if self._real is None:
                self._waiting.extend(message["parts"])
            else:
                for data, metadata, buffers in message["parts"]:
                    self._real.send(data, metadata=metadata, buffers=buffers)

    def on_msg(self, callback):  # pyviz_comms registers its handler on the open comm
        if self._real is not None:
            self._real.on_msg(callback)

    def close(self):
        if self._real is not None:
            self._real.close()


def _message_parts(first) -> int:
    """How many parts a message beginning with ``first`` has: a Bokeh message's header names its buffers (each sent
    as two parts) after its header, metadata and content; anything else (a comm's reply) is one part."""
    import json

    if isinstance(first, str) and first.startswith("{") and '"msgtype"' in first:
        try:
            header = json.loads(first)
        except ValueError:
            return 1
        if "msgid" in header and "msgtype" in header:
            return 3 + 2 * int(header.get("num_buffers", 0))
    return 1


@functools.lru_cache(maxsize=64)
def _panel_css(url: str) -> str | None:
    """The text of one of Panel's own style sheets, read from the installed package, or None."""
    from panel.io.resources import CDN_DIST, DIST_DIR, LOCAL_DIST

    prefix = next((p for p in (CDN_DIST, LOCAL_DIST) if url.startswith(p)), None)
    if prefix is None:
        return None
    path = DIST_DIR / url[len(prefix):].split("?")[0]
    return path.read_text(encoding="utf-8") if path.is_file() else None


def _inline_panel_css(data):
    """A Bokeh patch message (JSON text) with every style sheet imported from Panel's CDN made inline."""
    import json

    from panel.io.resources import CDN_DIST, LOCAL_DIST

    if not isinstance(data, str) or "ImportedStyleSheet" not in data or (CDN_DIST not in data
                                                                         and LOCAL_DIST not in data):
        return data
    msg = json.loads(data)

    def walk(node):
        if isinstance(node, dict):
            if node.get("name") == "ImportedStyleSheet":
                css = _panel_css(node.get("attributes", {}).get("url", ""))
                if css is not None:
                    return {"type": "object", "name": "InlineStyleSheet", "id": node["id"],
                            "attributes": {"css": css}}
            return {k: walk(v) for k, v in node.items()}
        if isinstance(node, list):
            return [walk(v) for v in node]
        return node
    return json.dumps(walk(msg))
