"""Text snapshots of the console's main screens at 80x24 and 160x48.

A snapshot is the screen's plain text with what legitimately changes from run to run taken out:
numbers become '#', runs of spaces collapse, the temporary log folder becomes <LOGDIR>, and the
cells of live plots are blanked. Everything else — labels, layout, key hints, the kill hint — must
match the golden file in tests/ui_snapshots/. A missing golden file is written and the test fails
so a person reviews it; set TETHERLOOP_UPDATE_SNAPSHOTS=1 to rewrite them after a deliberate
change. An SVG of every screen is saved next to the test's temporary files for review.
"""

from __future__ import annotations

import asyncio
import os
import re
import shutil
import tempfile
from pathlib import Path

import pytest

from agent.ui.app import ConsoleOptions, StandConsole
from agent.ui.caution import CautionScreen
from agent.ui.widgets import TracePlot

from test_ui_console import _pilot_idle_with_a_busy_simulator, connected, wait_for  # noqa: F401

GOLDEN = Path(__file__).parent / "ui_snapshots"
FAKE_PORTS = [("/dev/ttyFAKE0", "Invented USB serial bridge", "USB VID:PID=0000:0000")]
TABS = ("f2", "f3", "f4", "f5", "f6", "f7")
NAMES = {"f2": "link", "f3": "scope", "f4": "plan", "f5": "run", "f6": "results",
         "f7": "logbook"}


def normalized(app, log_dir: str) -> str:
    lines = [list(strip.text) for strip in app.screen._compositor.render_strips()]
    for plot in app.screen.query(TracePlot):
        if not plot.display:
            continue
        r = plot.region
        for y in range(r.y, min(r.y + r.height, len(lines))):
            row = lines[y]
            for x in range(r.x, min(r.x + r.width, len(row))):
                row[x] = " "
    out = []
    for row in lines:
        s = "".join(row).replace(log_dir, "<LOGDIR>")
        s = re.sub(r"/dev/pts/\d+", "<PTY>", s)
        s = re.sub(r"\d[\d.,]*(e[+-]?\d+)?", "#", s)
        # the link figures read "-" until their first second of telemetry has been counted
        s = re.sub(r"(?<= )-(?= (tel/s|frames/s|ms)\b)", "#", s)
        s = re.sub(r" {2,}", " ", s).rstrip()
        out.append(s)
    return "\n".join(out) + "\n"


def check(name: str, text: str, svg_dir: Path, app) -> None:
    app.save_screenshot(filename=f"{name}.svg", path=str(svg_dir))
    (svg_dir / f"{name}.txt").write_text(text, encoding="utf-8")
    golden = GOLDEN / f"{name}.txt"
    if os.environ.get("TETHERLOOP_UPDATE_SNAPSHOTS") == "1" or not golden.exists():
        GOLDEN.mkdir(exist_ok=True)
        existed = golden.exists()
        golden.write_text(text, encoding="utf-8")
        if not existed:
            pytest.fail(f"snapshot {golden} was missing and has been written: review it "
                        f"(SVG in {svg_dir}) and run the test again")
        return
    want = golden.read_text(encoding="utf-8")
    assert text == want, (f"screen {name} differs from {golden} (SVG in {svg_dir}).\n--- now:\n"
                          f"{text}\n--- golden:\n{want}")


async def settled(pilot, log_dir: str) -> str:
    """The normalized screen once the key hints are drawn and two looks agree (the footer is
    rebuilt whenever the focus moves)."""
    box = {"last": None}

    def same_twice() -> bool:
        text = normalized(pilot.app, log_dir)
        ok = "^k KILL" in text.splitlines()[-1] and text == box["last"]
        box["last"] = text
        return ok

    await wait_for(pilot, same_twice, "the screen to settle with its key hints")
    return box["last"]


@pytest.mark.parametrize("size", [(80, 24), (160, 48)], ids=["80x24", "160x48"])
def test_main_screens(size, tmp_path, monkeypatch):
    import agent.link
    monkeypatch.setattr(agent.link, "list_ports", lambda: list(FAKE_PORTS))
    log_dir = tempfile.mkdtemp(prefix="tlsnap", dir="/tmp")
    w, h = size

    async def run():
        # without a board: the Link tab and the safety check
        app = StandConsole(ConsoleOptions(log_dir=log_dir))
        async with app.run_test(size=size) as pilot:
            text = await settled(pilot, log_dir)
            assert "Ctrl+K: KILL" in text.splitlines()[0], "the kill hint is always on top"
            check(f"offline-link-{w}x{h}", text, tmp_path, app)
            app.push_screen(CautionScreen("run the plan (roll.rate)"))
            await wait_for(pilot, lambda: "Propellers" in normalized(app, log_dir),
                           "the safety check")
            check(f"caution-{w}x{h}", await settled(pilot, log_dir), tmp_path, app)
        # the simulated stand, idle, every tab
        app = StandConsole(ConsoleOptions(demo=True, log_dir=log_dir, speed="5", seed=1))
        async with app.run_test(size=size) as pilot:
            await connected(pilot)
            for key in TABS:
                await pilot.press(key)
                await pilot.pause(0.3)
                text = await settled(pilot, log_dir)
                first = text.splitlines()[0]
                assert "DISARMED" in first and "Ctrl+K: KILL" in first, first
                check(f"{NAMES[key]}-{w}x{h}", text, tmp_path, app)
            await pilot.press("ctrl+q")

    try:
        asyncio.run(run())
    finally:
        shutil.rmtree(log_dir, ignore_errors=True)
