"""Offline work on logged sessions: re-analysis reproduces the online result (and says what
differs when something changed), export, and the HTML report."""

from __future__ import annotations

import base64
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from agent.analysis import detect_cycles, simulate_relay
from agent.logbook import (Logbook, LogbookError, analyze_session, columns_from_telemetry,
                           export_session, read_session, relay_record_from_rows, report_session)
from agent.logbook.synthetic import write_demo_session
from protocol.messages import AxisSample, Telemetry


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> Path:
    return write_demo_session(tmp_path_factory.mktemp("logs"), name="demo", seed=3)


@pytest.fixture
def demo_copy(demo, tmp_path) -> Path:
    dst = tmp_path / "logs" / "demo"
    shutil.copytree(demo, dst)
    return dst


def results_path(session: Path) -> Path:
    return session / "e01-roll-rate-relay" / "results.json"


def test_offline_reanalysis_reproduces_the_online_result(demo):
    out = {r.exp_id: r for r in analyze_session(demo)}
    r = out["e01-roll-rate-relay"]
    assert r.status == "reproduced" and r.differences == [], r.differences
    logged = read_session(demo).experiments["e01-roll-rate-relay"].result
    assert r.identification == logged["identification"]  # bit for bit through JSON
    assert r.tuning == logged["tuning"]
    assert out["e02-roll-rate-step"].status == "skipped"
    assert "step experiment" in out["e02-roll-rate-step"].message
    assert out["e03-pitch-rate-relay"].status == "skipped"
    only = analyze_session(demo, "e02-roll-rate-step")
    assert [x.exp_id for x in only] == ["e02-roll-rate-step"]


def test_rows_from_disk_equal_rows_seen_online(tmp_path):
    # The online side builds columns from the telemetry it received; the offline side reads
    # them back from the CSV. Both must give the identical analysis record.
    sim = simulate_relay([2.0], [0.5, 1.0], 0.05, 0.3, 0.01, 0.1, 0.002, 3.0, noise_std=0.002,
                         seed=1)
    samples = []
    for i in range(len(sim.t_s)):
        a = AxisSample(2, 0, 0.0, float(np.float32(sim.y[i])), float(np.float32(sim.u[i])),
                       1 if sim.u[i] > 0.1 else -1)
        other = AxisSample(0, 1, 0.0, 0.0, 0.0, 0)
        samples.append((1e9 + i * 0.002, Telemetry(time_us=7_000_000 + 2000 * i, counter=i,
                                                   state=2, tag=4, axes=(other, a))))
    s = Logbook(tmp_path, min_free_bytes=0).open_session(
        device={}, settings_before={}, plan={}, tool_version="0", protocol_version="1.0",
        name="rt")
    e = s.experiment("yaw", {"kind": "relay", "axis": 2, "loop": 0})
    for h, t in samples:
        e.append(h, t)
    s.close("completed")
    ai = {"axis": 2, "t_start_us": 7_500_000, "t_end_us": 9_990_000, "amplitude": 0.3,
          "hysteresis": 0.01, "bias": 0.1, "setpoint": 0.0, "sample_time_s": 0.002,
          "sampling_delay_s": 0.001}
    online = relay_record_from_rows(columns_from_telemetry(samples), ai)
    offline = relay_record_from_rows(read_session(s.path).experiments["yaw"].columns, ai)
    for name in ("t_s", "y", "u"):
        assert np.array_equal(getattr(online, name), getattr(offline, name))
    assert online.t_s[0] == 7.5 and online.t_s[-1] == pytest.approx(9.99)
    assert len(online.t_s) == 1246 and offline.bias == 0.1 and offline.amplitude == 0.3
    assert (offline.setpoint, offline.hysteresis, offline.sample_time_s,
            offline.sampling_delay_s) == (0.0, 0.01, 0.002, 0.001)


def test_relay_period_from_the_logged_record_matches_the_exact_fopdt_limit_cycle(tmp_path):
    # Yu, C.-C. (2006), Autotuning of PID Controllers, 2nd ed.: an ideal relay on
    # K e^{-Ls}/(Ts+1) oscillates with period P = 2T ln(2 e^{L/T} - 1) and amplitude
    # a = K d (1 - e^{-L/T}). The board's sampling adds about half to one tick of delay, so the
    # comparison allows 2 %.
    K, T, L, d, dt = 1.5, 1.0, 0.2, 0.4, 0.002
    sim = simulate_relay([K], [T, 1.0], L, d, 0.0, 0.0, dt, 8.0)
    s = Logbook(tmp_path, min_free_bytes=0).open_session(
        device={}, settings_before={}, plan={}, tool_version="0", protocol_version="1.0",
        name="yu")
    e = s.experiment("e1", {"kind": "relay", "axis": 1, "loop": 0})
    for i in range(len(sim.t_s)):
        e.append(0.0, Telemetry(time_us=int(round(sim.t_s[i] * 1e6)), counter=i, state=2, tag=1,
                                axes=(AxisSample(1, 0, 0.0, float(np.float32(sim.y[i])),
                                                 float(np.float32(sim.u[i])), 0),)))
    s.close("completed")
    ai = {"axis": 1, "t_start_us": 3_000_000, "t_end_us": 8_000_000, "amplitude": d,
          "hysteresis": 0.0, "bias": 0.0, "setpoint": 0.0, "sample_time_s": dt,
          "sampling_delay_s": dt / 2}
    rec = relay_record_from_rows(read_session(s.path).experiments["e1"].columns, ai)
    cyc = detect_cycles(rec.t_s, rec.y, rec.u)
    assert cyc.n_cycles >= 5
    assert cyc.period_s == pytest.approx(2 * T * np.log(2 * np.exp(L / T) - 1), rel=0.02)
    assert cyc.amplitude == pytest.approx(K * d * (1 - np.exp(-L / T)), rel=0.02)


def test_a_changed_result_is_reported_with_what_differs(demo_copy):
    doc = json.loads(results_path(demo_copy).read_text())
    ident = doc["result"]["identification"]
    ident["best"]["ku"] *= 1.01
    del ident["noise_std"]
    doc["result"]["tuning"]["recommended"] = "ziegler_nichols"
    results_path(demo_copy).write_text(json.dumps(doc))
    r = analyze_session(demo_copy, "e01-roll-rate-relay")[0]
    assert r.status == "differs" and "3 difference(s)" in r.message
    text = "\n".join(r.differences)
    assert re.search(r"identification\.best\.ku: logged [0-9.]+, now [0-9.]+", text)
    assert "identification.noise_std: new, now" in text
    assert 'tuning.recommended: logged "ziegler_nichols", now' in text


def test_an_unusable_window_is_an_error_not_a_crash(demo_copy):
    doc = json.loads(results_path(demo_copy).read_text())
    doc["result"]["analysis_input"]["t_start_us"] = 10**12
    doc["result"]["analysis_input"]["t_end_us"] = 10**12 + 1
    results_path(demo_copy).write_text(json.dumps(doc))
    r = analyze_session(demo_copy, "e01-roll-rate-relay")[0]
    assert r.status == "error" and "no telemetry rows of axis 0" in r.message
    with pytest.raises(LogbookError, match="has no experiment 'nope'.*e01-roll-rate-relay"):
        analyze_session(demo_copy, "nope")


def test_a_truncated_record_still_reanalyses_and_says_it_differs(demo_copy):
    f = demo_copy / "e01-roll-rate-relay" / "telemetry.csv"
    data = f.read_bytes()
    f.write_bytes(data[: int(len(data) * 0.8)])  # lose the last fifth, cut mid-row
    sess = read_session(demo_copy)
    assert any("last row was cut off" in n for n in sess.notes)
    r = analyze_session(demo_copy, "e01-roll-rate-relay")[0]
    assert r.status in ("differs", "error") and r.message


def test_export_csv_and_npz_give_the_logged_columns(demo, tmp_path):
    sess = read_session(demo)
    files = export_session(demo, "csv", tmp_path / "csv")
    assert [p.name for p in files] == [f"demo_{e}.csv" for e in sess.experiments]
    x = sess.experiments["e01-roll-rate-relay"]
    table = np.loadtxt(files[0], delimiter=",", skiprows=1)
    assert table.shape == (x.recovered_rows, 11)
    assert np.array_equal(table[:, 8].astype(np.float32), x.columns["measurement"])
    assert np.array_equal(table[:, 1].astype(np.int64), x.columns["time_us"])
    files = export_session(demo, "npz", tmp_path / "npz")
    with np.load(files[0]) as z:
        assert np.array_equal(z["output"], x.columns["output"])
        assert json.loads(str(z["meta_json"]))["axis_name"] == "roll"
        assert json.loads(str(z["result_json"]))["chosen"]["rule"]
        assert str(z["session"]) == "demo"
    with pytest.raises(LogbookError, match="unknown export format 'xls'; use csv or npz"):
        export_session(demo, "xls", tmp_path)


def test_report_renders_with_embedded_plots_and_kills(demo, tmp_path):
    out = report_session(demo, tmp_path / "r" / "report.html")
    text = out.read_text(encoding="utf-8")
    images = re.findall(r"src='data:image/png;base64,([A-Za-z0-9+/=]+)'", text)
    # relay (x2 experiments), model, candidates, verification step
    assert len(images) == 5
    for b64 in images:
        assert base64.b64decode(b64)[:8] == b"\x89PNG\r\n\x1a\n"
    assert "<tr class='kill'>" in text and "kill_tripped" in text
    assert "ms_constrained" in text and "Chosen gains" in text and "reproduced" in text
    assert "Plot failed" not in text and "http" not in text.split("<body>")[1]  # self-contained


def test_report_of_a_crashed_session_renders_with_its_notes(demo_copy, tmp_path):
    m = json.loads((demo_copy / "manifest.json").read_text())
    m["outcome"] = None
    (demo_copy / "manifest.json").write_text(json.dumps(m))
    (demo_copy / "e01-roll-rate-relay" / "results.json").unlink()
    with open(demo_copy / "e02-roll-rate-step" / "telemetry.csv", "ab") as fh:
        fh.write(b"12.5,99")
    text = report_session(demo_copy, tmp_path / "c.html").read_text()
    assert "Recovery notes" in text and "not closed" in text and "cut off" in text
    assert "no analysis input was logged" in text
    assert len(re.findall("data:image/png;base64,", text)) == 3


def test_a_damaged_result_file_is_an_error_not_an_experiment_without_result(demo_copy):
    # before: "its results.json holds no analysis_input"/skipped, and `analyze` exited 0
    results_path(demo_copy).write_text('{"format": "tetherloop-logbook", "res')
    r = analyze_session(demo_copy, "e01-roll-rate-relay")[0]
    assert r.status == "error" and "damaged" in r.message


def test_a_missing_experiment_folder_is_reported(demo_copy):
    import shutil
    shutil.rmtree(results_path(demo_copy).parent)
    rows = analyze_session(demo_copy)
    gone = [r for r in rows if r.exp_id == "e01-roll-rate-relay"]
    assert gone and gone[0].status == "error" and "folder is missing" in gone[0].message
