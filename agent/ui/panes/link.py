"""Link tab: choose a port (or the built-in simulated stand), connect, see who answered and how
healthy the link is."""

from __future__ import annotations

from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.message import Message
from textual.widgets import Input, Label, ListItem, ListView, Static

from ..state import MOCK_ID, LinkHealth
from ..widgets import KeyValues, fmt


class PortItem(ListItem):
    def __init__(self, port: str, text: str):
        super().__init__(Label(text, markup=False))
        self.port = port


class LinkPane(Vertical):
    """Posts ConnectRequested(port) and DisconnectRequested; shows what it is given."""

    BINDINGS = [
        Binding("u", "refresh_ports", "Rescan ports"),
        Binding("d", "disconnect", "Disconnect"),
    ]

    class ConnectRequested(Message):
        """Connect to ``port`` (a device path, a URL, or MOCK_ID for the simulated stand)."""

        def __init__(self, port: str) -> None:
            super().__init__()
            self.port = port

    class DisconnectRequested(Message):
        """Close the connection."""

    def __init__(self, mock_label: str, **kw):
        super().__init__(**kw)
        self.mock_label = mock_label

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
        self.action_refresh_ports()
        self.show_identity(None)

    # ------------------------------------------------------------------ ports
    def action_refresh_ports(self) -> None:
        lv = self.query_one("#port-list", ListView)
        lv.clear()
        lv.append(PortItem(MOCK_ID, self.mock_label))
        try:
            from agent.link import list_ports
            ports = list_ports()
        except OSError as exc:  # pyserial's enumeration can fail on odd systems
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
            self.post_message(self.ConnectRequested(item.port))

    def on_input_submitted(self, event: Input.Submitted) -> None:
        port = event.value.strip()
        if not port:
            self.say("type a serial device path (e.g. /dev/ttyACM0) or a URL "
                     "(socket://host:port) first")
            return
        self.post_message(self.ConnectRequested(port))

    def action_disconnect(self) -> None:
        self.post_message(self.DisconnectRequested())

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

    def show_health(self, h: LinkHealth | None) -> None:
        """The link's figures (drawn on connecting, on showing the tab, and by the app's link
        timer)."""
        if h is None:
            self.query_one("#health", KeyValues).show([], title="Link")
            return
        self.query_one("#health", KeyValues).show([
            ("telemetry", f"{fmt(h.rate_hz, 4)} frames/s"),
            ("frames in/out", f"{h.frames_in} / {h.frames_out}"),
            ("bad frames", str(h.bad_frames)),
            ("retries/timeouts", f"{h.retries} / {h.timeouts}"),
            ("latency median", fmt(h.latency_ms, 3, "ms")),
            ("link", f"LOST: {h.lost}" if h.lost else "ok"),
        ], title="Link health")
