"""Logbook tab: browse the session logs, open one, re-analyse it with the current code, export
its telemetry and write its HTML report (all through agent.logbook)."""

from __future__ import annotations

from pathlib import Path

from textual import work
from textual.app import ComposeResult
from textual.binding import Binding
from textual.containers import Horizontal, Vertical
from textual.widgets import DataTable, RichLog, Static
from textual.worker import Worker, WorkerState

from agent.errors import TetherloopError


class LogbookPane(Vertical):
    """The session logs of ``log_dir`` (None: the default folder). Reading and re-analysing run
    in workers of their own (group ``logbook``): they never touch the stand."""

    BINDINGS = [
        Binding("u", "refresh", "Rescan"),
        Binding("r", "reanalyse", "Re-analyse"),
        Binding("e", "export", "Export"),
        Binding("h", "report", "Report"),
    ]

    def __init__(self, log_dir: str | None, **kw):
        super().__init__(**kw)
        self._log_dir = log_dir

    def compose(self) -> ComposeResult:
        yield Static("", id="logbook-where", classes="message")
        with Horizontal(id="logbook-body"):
            yield DataTable(id="sessions", cursor_type="row", zebra_stripes=True)
            yield RichLog(id="session-detail", wrap=True, markup=False, min_width=20)

    def on_mount(self) -> None:
        self.summaries: list = []
        self.opened: Path | None = None
        t = self.query_one("#sessions", DataTable)
        t.add_columns("session", "started", "tuned", "exp", "kills", "outcome")

    def log_dir(self) -> Path:
        from agent.logbook import default_log_dir
        d = self._log_dir
        return Path(d).expanduser() if d else default_log_dir()

    def action_refresh(self) -> None:
        from agent.logbook import LogbookError, list_sessions
        where = self.query_one("#logbook-where", Static)
        table = self.query_one("#sessions", DataTable)
        table.clear()
        d = self.log_dir()
        try:
            self.summaries = list_sessions(d)
        except (LogbookError, OSError) as exc:
            self.summaries = []
            where.update(f"cannot list {d}: {exc}")
            return
        for s in self.summaries:
            table.add_row(s.name, (s.started_at or "?").replace("T", " ")[:19],
                          ", ".join(s.tuned) or "-", str(s.experiments), str(s.kills),
                          s.problem or s.outcome or "-", key=str(s.path))
        where.update(f"{len(self.summaries)} sessions in {d}  (Enter opens one)" if self.summaries
                     else f"No sessions in {d} yet: a run on the Run tab records one.")

    def selected_path(self) -> Path | None:
        table = self.query_one("#sessions", DataTable)
        if not self.summaries or table.cursor_row is None:
            return None
        row = table.cursor_row
        return Path(self.summaries[row].path) if 0 <= row < len(self.summaries) else None

    def on_data_table_row_selected(self, event: DataTable.RowSelected) -> None:
        path = self.selected_path()
        if path is not None:
            self.open_session(path)

    def _detail(self) -> RichLog:
        return self.query_one("#session-detail", RichLog)

    def open_session(self, path: Path) -> None:
        from agent.logbook import LogbookError, read_session
        log = self._detail()
        log.clear()
        try:
            rec = read_session(path)
        except (LogbookError, OSError) as exc:
            log.write(f"cannot read {path.name}: {exc}")
            return
        self.opened = Path(path)
        man = rec.manifest
        dev = man.get("device") or {}
        log.write(f"session {rec.name}")
        log.write(f"started  {man.get('started_at')}   ended {man.get('ended_at')}")
        log.write(f"outcome  {man.get('outcome')}")
        log.write(f"board    {dev.get('device_id')} fw {dev.get('firmware_version')} "
                  f"protocol {man.get('protocol_version')}")
        conf = man.get("confirmations") or {}
        log.write(f"cautions {conf.get('cautions', 'not recorded')}")
        log.write(f"experiments ({len(rec.experiments)}):")
        for exp_id, exp in rec.experiments.items():
            log.write(f"  {exp_id:<22} {exp.kind or '?'}")
        kills = [e for e in rec.events if str(e.get("kind", "")).startswith("kill")
                 and e.get("kind") != "kill_cleared"]
        for k in kills:
            log.write(f"KILL {k.get('origin', '')} {k.get('reason', '')} axis "
                      f"{k.get('axis_name', '')} value {k.get('value', '')}")
        for n in rec.notes:
            log.write(f"note: {n}")
        log.write("r re-analyse   e export CSV   h HTML report")

    def _need_open(self) -> Path | None:
        path = self.opened or self.selected_path()
        if path is None:
            self.notify("choose a session first (arrows, Enter)", severity="warning")
        return path

    def action_reanalyse(self) -> None:
        path = self._need_open()
        if path is not None:
            self._detail().write(f"re-analysing {path.name} ...")
            self._reanalyse(path)

    def action_export(self) -> None:
        path = self._need_open()
        if path is not None:
            self._export(path, Path.cwd() / f"{path.name}-export")

    def action_report(self) -> None:
        path = self._need_open()
        if path is not None:
            self._report(path, path / "report.html")

    # the workers return the lines to show; an error they did not expect is shown by
    # on_worker_state_changed (and never stops the console)
    @work(thread=True, exclusive=True, group="logbook", exit_on_error=False,
          description="re-analysis")
    def _reanalyse(self, path: Path) -> list[str]:
        from agent.logbook import analyze_session
        try:
            results = analyze_session(path)
        except (TetherloopError, OSError) as exc:
            return [f"re-analysis failed: {exc}"]
        lines = [f"re-analysis of {path.name} with the current code:"]
        for r in results:
            lines.append(f"  {r.exp_id:<22} {r.status:<10} {r.message}")
            lines += [f"      {d}" for d in r.differences[:5]]
        if not results:
            lines.append("  (no experiments)")
        return lines

    @work(thread=True, exclusive=True, group="logbook", exit_on_error=False,
          description="export")
    def _export(self, path: Path, out: Path) -> list[str]:
        from agent.logbook import export_session
        try:
            files = export_session(path, "csv", out)
        except (TetherloopError, OSError) as exc:
            return [f"export failed: {exc}"]
        return [f"exported {len(files)} files to {out}"]

    @work(thread=True, exclusive=True, group="logbook", exit_on_error=False,
          description="report")
    def _report(self, path: Path, out: Path) -> list[str]:
        from agent.logbook import report_session
        try:
            written = report_session(path, out)
        except (TetherloopError, OSError) as exc:
            return [f"report failed: {exc}"]
        return [f"report written: {written}"]

    def on_worker_state_changed(self, event: Worker.StateChanged) -> None:
        w = event.worker
        if w.group != "logbook":
            return
        if event.state == WorkerState.SUCCESS:
            self._write_lines(w.result or [])
        elif event.state == WorkerState.ERROR:
            self._write_lines([f"{w.description} failed: {type(w.error).__name__}: {w.error}"])

    def _write_lines(self, lines) -> None:
        log = self._detail()
        for ln in lines:
            log.write(ln)
