"""Link tab: choose a port (or the built-in simulated stand), connect, see who answered and how
healthy the link is."""

from __future__ import annotations

import time

from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.widgets import Input, Label, ListItem, ListView, Static

from ..widgets import KeyValues, fmt

MOCK_ID = "__mock__"


class PortItem(ListItem):
    def __init__(self, port: str, text: str):
        super().__init__(Label(text, markup=False))
        self.port = port


class LinkPane(Vertical):
    BINDINGS = [
        Binding("u", "refresh_ports", "Rescan ports"),
        Binding("d", "disconnect", "Disconnect"),
    ]

    def compose(self) -> ComposeResult:
        with Horizontal(id="link-row"):
            with Vertical(id="link-left"):
                yield Label("Boards to talk to (Enter connects):", classes="section")
                yield ListView(id="port-list")
                yield Input(placeholder="or type a port / URL and press Enter", id="port-input",
                            compact=True)
            with Vertical(id="link-right"):
                yield KeyValues(id="identity")
                yield KeyValues(id="health")
        yield Static("", id="link-message", classes="message")

    def on_mount(self) -> None:
        self._last = (time.monotonic(), 0)
        self.rate_hz = float("nan")
        self.action_refresh_ports()
        self.show_identity(None)

    # ------------------------------------------------------------------ ports
    def action_refresh_ports(self) -> None:
        lv = self.query_one("#port-list", ListView)
        lv.clear()
        opts = self.app.options
        lv.append(PortItem(MOCK_ID, f"Simulated stand (built-in, invented '{opts.scenario}', "
                                    f"clock x{opts.speed})"))
        try:
            from agent.link import list_ports
            ports = list_ports()
        except Exception as exc:  # pyserial's enumeration can fail on odd systems
            ports = []
            self.say(f"could not list serial ports: {exc}")
        for dev, desc, hwid in ports:
            lv.append(PortItem(dev, f"{dev}  {desc or ''}  {hwid or ''}".rstrip()))
        if not ports:
            lv.append(PortItem("", "(no serial ports found on this machine)"))
        lv.index = 0

    def on_list_view_selected(self, event: ListView.Selected) -> None:
        item = event.item
        if isinstance(item, PortItem) and item.port:
            self.app.connect(item.port)

    def on_input_submitted(self, event: Input.Submitted) -> None:
        port = event.value.strip()
        if not port:
            self.say("type a serial device path (e.g. /dev/ttyACM0) or a URL "
                     "(socket://host:port) first")
            return
        self.app.connect(port)

    def action_disconnect(self) -> None:
        self.app.disconnect()

    def say(self, text: str, error: bool = False) -> None:
        msg = self.query_one("#link-message", Static)
        msg.set_class(error, "error")
        msg.update(text)

    # ------------------------------------------------------------------ identity and health
    def show_identity(self, stand) -> None:
        ident = self.query_one("#identity", KeyValues)
        if stand is None:
            ident.show([("board", "not connected")], title="Board")
            self.query_one("#health", KeyValues).show([], title="Link")
            return
        info = stand.info
        axes = "; ".join(f"{a}: {'+'.join(levels)}" for a, levels in info.axes.items())
        ident.show([("board", info.device_id), ("firmware", info.firmware_version),
                    ("protocol", info.protocol), ("loop rate", f"{info.loop_rate_hz} Hz"),
                    ("loops", axes), ("port", str(stand.link.port_name)),
                    ("simulated", "yes (invented stand)" if stand.mock is not None else "no")],
                   title="Board")

    def tick(self, stand) -> None:
        """Refresh link health (called by the app's timer)."""
        if stand is None:
            return
        st = stand.link.stats
        now = time.monotonic()
        t0, n0 = self._last
        if now - t0 >= 0.5:
            self.rate_hz = (st.telemetry - n0) / (now - t0)
            self._last = (now, st.telemetry)
        lost = stand.link.lost_reason
        self.query_one("#health", KeyValues).show([
            ("telemetry", f"{fmt(self.rate_hz, 4)} frames/s"),
            ("frames in/out", f"{st.frames_in} / {st.frames_out}"),
            ("bad frames", str(st.bad_frames)),
            ("retries/timeouts", f"{st.retries} / {st.timeouts}"),
            ("latency median", fmt(stand.link.latency_ms_median(), 3, "ms")),
            ("link", f"LOST: {lost}" if lost else "ok"),
        ], title="Link health")
