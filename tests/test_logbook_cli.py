"""The offline logbook commands through the real ``tetherloop`` parser."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from agent.cli import main
from agent.logbook import Logbook
from agent.logbook.synthetic import write_demo_session


@pytest.fixture(scope="module")
def logs(tmp_path_factory) -> Path:
    d = tmp_path_factory.mktemp("clilogs")
    write_demo_session(d, name="demo", seed=5, with_kill=False)
    s = Logbook(d, min_free_bytes=0).open_session(
        device={"device_id": "empty-board"}, settings_before={}, plan={}, tool_version="0",
        protocol_version="1.0", name="empty")
    s.close("completed")
    return d


def test_sessions_lists_by_log_dir_env_and_positional(logs, capsys, monkeypatch):
    assert main(["sessions", "--log-dir", str(logs), "--json"]) == 0
    rows = {r["name"]: r for r in json.loads(capsys.readouterr().out)}
    assert set(rows) == {"demo", "empty"}
    assert rows["demo"]["tuned"] == ["roll.rate"] and rows["demo"]["outcome"] == "completed"
    monkeypatch.setenv("TETHERLOOP_LOG_DIR", str(logs))
    assert main(["sessions"]) == 0
    out = capsys.readouterr().out
    assert "demo" in out and "empty-board" in out and "roll.rate" in out
    monkeypatch.setenv("TETHERLOOP_LOG_DIR", "/nonexistent/place")
    assert main(["sessions", str(logs)]) == 0
    assert "demo" in capsys.readouterr().out
    assert main(["sessions"]) == 2
    assert "the log folder /nonexistent/place does not exist" in capsys.readouterr().err


def test_analyze_by_name_and_by_path(logs, capsys, monkeypatch):
    assert main(["analyze", "demo", "--log-dir", str(logs), "--json"]) == 0
    res = {r["exp_id"]: r for r in json.loads(capsys.readouterr().out)}
    assert res["e01-roll-rate-relay"]["status"] == "reproduced"
    assert res["e02-roll-rate-step"]["status"] == "skipped"
    monkeypatch.setenv("COLUMNS", "200")
    assert main(["analyze", str(logs / "demo"), "--experiment", "e02-roll-rate-step"]) == 0
    assert "skipped" in capsys.readouterr().out


def test_analyze_exit_code_and_report_when_something_differs(logs, tmp_path, capsys,
                                                             monkeypatch):
    sess = tmp_path / "demo"
    shutil.copytree(logs / "demo", sess)
    f = sess / "e01-roll-rate-relay" / "results.json"
    doc = json.loads(f.read_text())
    doc["result"]["identification"]["cycles"]["period_s"] = 123.0
    f.write_text(json.dumps(doc))
    monkeypatch.setenv("COLUMNS", "200")
    assert main(["analyze", str(sess), "--experiment", "e01-roll-rate-relay"]) == 1
    out = capsys.readouterr().out
    assert "differs" in out and "identification.cycles.period_s: logged 123" in out


def test_unknown_session_and_bad_version_are_user_errors(logs, tmp_path, capsys):
    assert main(["analyze", "nope", "--log-dir", str(logs)]) == 2
    err = capsys.readouterr().err
    assert "no session 'nope'" in err and "demo" in err and "tetherloop sessions" in err
    sess = tmp_path / "old"
    shutil.copytree(logs / "empty", sess)
    m = json.loads((sess / "manifest.json").read_text())
    m["format_version"] = "2.0"
    (sess / "manifest.json").write_text(json.dumps(m))
    for argv in (["analyze", str(sess)], ["report", str(sess), "--out", str(tmp_path / "x")],
                 ["export", str(sess), "--format", "csv", "--out", str(tmp_path / "y")]):
        assert main(argv) == 2
        err = capsys.readouterr().err
        assert err.startswith("tetherloop: error:") and "format 2.0" in err
        assert "Traceback" not in err


def test_export_and_report_write_files(logs, tmp_path, capsys):
    assert main(["export", "demo", "--log-dir", str(logs), "--format", "npz", "--out",
                 str(tmp_path / "e")]) == 0
    assert sorted(p.name for p in (tmp_path / "e").iterdir()) == [
        "demo_e01-roll-rate-relay.npz", "demo_e02-roll-rate-step.npz"]
    capsys.readouterr()
    assert main(["report", "empty", "--log-dir", str(logs), "--out",
                 str(tmp_path / "r.html")]) == 0
    text = (tmp_path / "r.html").read_text()
    assert "tetherloop session empty" in text and "wrote" in capsys.readouterr().out
