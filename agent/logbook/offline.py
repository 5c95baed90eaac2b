"""Offline work on a logged session: re-analysis with the current code, and export."""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from .format import COLUMNS, LogbookError, dumps
from .reader import ExperimentRecord, read_session
from .records import relay_record_from_rows, tune_kwargs

REL_TOL = 1e-9
ABS_TOL = 1e-12
MAX_DIFFS = 40


@dataclass(frozen=True)
class Reanalysis:
    """Outcome of re-running identification and tuning on one logged experiment.

    ``status`` is "reproduced" (same numbers as logged), "differs" (``differences`` says what),
    "new" (nothing was logged to compare with), "error" (the analysis refused the record;
    ``message`` says why) or "skipped" (not a relay experiment with an analysis input).
    """

    exp_id: str
    status: str
    message: str
    identification: dict | None = None
    tuning: dict | None = None
    differences: list[str] = field(default_factory=list)
    analysis_input: dict | None = None

    @property
    def reproduced(self) -> bool:
        return self.status == "reproduced"

    def to_dict(self) -> dict:
        return {"exp_id": self.exp_id, "status": self.status, "message": self.message,
                "differences": list(self.differences), "analysis_input": self.analysis_input,
                "identification": self.identification, "tuning": self.tuning}


# ---------------------------------------------------------------------------- comparing results

def _is_num(x: Any) -> bool:
    return isinstance(x, (int, float)) and not isinstance(x, bool)


def _close(a: float, b: float) -> bool:
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return a == b or math.isclose(a, b, rel_tol=REL_TOL, abs_tol=ABS_TOL)


def _short(x: Any) -> str:
    text = json.dumps(x, default=str) if not isinstance(x, float) else f"{x:.6g}"
    return text if len(text) <= 60 else text[:57] + "..."


def compare_results(logged: Any, now: Any, path: str = "") -> list[str]:
    """Differences between a logged result tree and a recomputed one, in words.

    Numbers compare with a relative tolerance of 1e-9 (JSON keeps floats exactly, so an unchanged
    computation matches to the last bit; the tolerance only absorbs harmless reordering).
    """
    out: list[str] = []
    _cmp(logged, now, path or "result", out)
    return out


def _cmp(a: Any, b: Any, path: str, out: list[str]) -> None:
    if isinstance(a, dict) and isinstance(b, dict):
        for k in a.keys() | b.keys():
            p = f"{path}.{k}"
            if k not in b:
                out.append(f"{p}: logged {_short(a[k])}, no longer computed")
            elif k not in a:
                out.append(f"{p}: new, now {_short(b[k])}")
            else:
                _cmp(a[k], b[k], p, out)
        return
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):
            out.append(f"{path}: logged {len(a)} items, now {len(b)}")
            return
        if a and all(_is_num(x) or x is None for x in a + b):
            x = np.array([np.nan if v is None else v for v in a], dtype=float)
            y = np.array([np.nan if v is None else v for v in b], dtype=float)
            bad = ~(np.isclose(x, y, rtol=REL_TOL, atol=ABS_TOL, equal_nan=True))
            if bad.any():
                dev = np.nanmax(np.abs(x[bad] - y[bad])) if np.isfinite(x[bad] - y[bad]).any() \
                    else float("nan")
                out.append(f"{path}: {int(bad.sum())} of {len(a)} values differ "
                           f"(largest difference {dev:.3g})")
            return
        for i, (x, y) in enumerate(zip(a, b)):
            _cmp(x, y, f"{path}[{i}]", out)
        return
    if _is_num(a) and _is_num(b):
        if not _close(float(a), float(b)):
            out.append(f"{path}: logged {_short(a)}, now {_short(b)}")
        return
    if a != b:
        out.append(f"{path}: logged {_short(a)}, now {_short(b)}")


def _jsonable(obj: Any) -> Any:
    """What the object looks like after being written to and read from results.json."""
    return json.loads(dumps(obj))


# ---------------------------------------------------------------------------- re-analysis

def reanalyze_experiment(rec: ExperimentRecord) -> Reanalysis:
    """Re-run identification and tuning on one experiment from its logged analysis input."""
    return reanalyze_with_objects(rec)[0]


def reanalyze_with_objects(rec: ExperimentRecord) -> tuple[Reanalysis, Any, Any, Any]:
    """:func:`reanalyze_experiment` plus the analysis objects (record, Identification,
    TuningResult), each None when not computed; the report plots from them."""
    result = rec.result or {}
    damaged = [n for n in rec.notes if "experiment result" in n and "damaged" in n]
    if rec.result is None and damaged:
        # a results.json that exists but cannot be read is damage, not "no result"
        return (Reanalysis(rec.exp_id, "error", f"not re-analysed: {damaged[0]}"),
                None, None, None)
    ai = result.get("analysis_input")
    if rec.meta.get("kind") not in (None, "relay") or not isinstance(ai, dict):
        why = ("it is a " + str(rec.meta.get("kind")) + " experiment"
               if rec.meta.get("kind") not in (None, "relay")
               else "its results.json holds no analysis_input" if rec.result is not None
               else "it has no results.json (the experiment did not finish)")
        return Reanalysis(rec.exp_id, "skipped", f"not re-analysed: {why}."), None, None, None
    from agent.analysis import identify, tune  # imported here: the logbook reads without it

    try:
        record = relay_record_from_rows(rec.columns, ai)
    except LogbookError as exc:
        return Reanalysis(rec.exp_id, "error", str(exc), analysis_input=ai), None, None, None
    try:
        ident = identify(record)
    except ValueError as exc:  # agent.analysis.RecordError is a ValueError
        msg = f"identification refused the record: {exc}"
        logged_err = result.get("error")
        status = "reproduced" if logged_err and str(exc) in str(logged_err) else "error"
        return Reanalysis(rec.exp_id, status, msg, analysis_input=ai), record, None, None
    ident_d = _jsonable(ident.to_dict())
    tuning_d = tuning = None
    tune_msg = ""
    try:
        tuning = tune(ident, **tune_kwargs(ai))
        tuning_d = _jsonable(tuning.to_dict())
    except ValueError as exc:
        tune_msg = f"; tuning refused: {exc}"
    diffs: list[str] = []
    logged_any = False
    if "identification" in result:
        logged_any = True
        diffs += compare_results(result["identification"], ident_d, "identification")
    if "tuning" in result:
        logged_any = True
        diffs += compare_results(result["tuning"], tuning_d, "tuning")
    if not logged_any:
        status, msg = "new", "nothing logged to compare with; computed now" + tune_msg
    elif diffs:
        status = "differs"
        msg = (f"{len(diffs)} difference(s) from the logged result: the analysis code or its "
               "settings changed since the experiment was recorded" + tune_msg)
    else:
        status, msg = "reproduced", "same identification and tuning as logged" + tune_msg
    if len(diffs) > MAX_DIFFS:
        diffs = diffs[:MAX_DIFFS] + [f"... and {len(diffs) - MAX_DIFFS} more"]
    return (Reanalysis(rec.exp_id, status, msg, identification=ident_d, tuning=tuning_d,
                       differences=diffs, analysis_input=ai), record, ident, tuning)


def analyze_session(path: Path | str, experiment: str | None = None) -> list[Reanalysis]:
    """Re-run identification and tuning on every relay experiment of a session (or one).

    Raises
    ------
    LogbookError
        The session cannot be read, or ``experiment`` is not in it.
    """
    sess = read_session(path)
    if experiment is not None:
        if experiment not in sess.experiments:
            known = ", ".join(sess.experiments) or "none"
            raise LogbookError(f"session {sess.name} has no experiment {experiment!r} "
                               f"(experiments: {known}).")
        recs = [sess.experiments[experiment]]
    else:
        recs = list(sess.experiments.values())
    out = [reanalyze_experiment(r) for r in recs]
    if experiment is None:
        present = set(sess.experiments)
        for entry in sess.manifest.get("experiments") or []:
            exp_id = entry.get("id") if isinstance(entry, dict) else None
            if exp_id and exp_id not in present:
                out.append(Reanalysis(exp_id, "error", f"not re-analysed: the manifest names "
                                      f"experiment {exp_id!r} but its folder is missing."))
    return out


# ---------------------------------------------------------------------------- export

def export_session(path: Path | str, fmt: str, out_dir: Path | str) -> list[Path]:
    """Write one file per experiment for other tools.

    ``csv``: ``<session>_<exp>.csv`` with one header line of column names and the rows as logged.
    ``npz``: ``<session>_<exp>.npz`` with one array per column plus ``meta_json`` and
    ``result_json`` (JSON text) and ``session``.
    """
    fmt = (fmt or "").lower()
    if fmt not in ("csv", "npz"):
        raise LogbookError(f"unknown export format {fmt!r}; use csv or npz.")
    sess = read_session(path)
    out = Path(out_dir)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise LogbookError(f"cannot create the export folder {out}: {exc.strerror or exc}; "
                           "choose another with --out.") from None
    written = []
    for exp_id, rec in sess.experiments.items():
        target = out / f"{sess.name}_{exp_id}.{fmt}"
        try:
            if fmt == "csv":
                _export_csv(rec, target)
            else:
                np.savez_compressed(
                    target, **{c: rec.columns[c] for c in COLUMNS},
                    meta_json=np.array(dumps(rec.meta)),
                    result_json=np.array(dumps(rec.result)),
                    session=np.array(sess.name))
        except OSError as exc:
            raise LogbookError(f"cannot write {target}: {exc.strerror or exc}.") from None
        written.append(target)
    return written


def _export_csv(rec: ExperimentRecord, target: Path) -> None:
    cols = rec.columns
    n = rec.recovered_rows
    with open(target, "w", encoding="ascii", newline="") as fh:
        fh.write(",".join(COLUMNS) + "\n")
        h = cols["host_time_s"]
        ints = [cols[c] for c in ("time_us", "counter", "state", "tag", "axis", "loop")]
        fl = [cols[c] for c in ("setpoint", "measurement", "output")]
        rel = cols["relay"]
        lines = []
        for i in range(n):
            lines.append(f"{h[i]:.6f}," + ",".join(str(int(c[i])) for c in ints) + ","
                         + ",".join(f"{float(c[i]):.9g}" for c in fl) + f",{int(rel[i])}\n")
            if len(lines) >= 10000:
                fh.write("".join(lines))
                lines.clear()
        fh.write("".join(lines))
