"""Test-only deviations from protocol/SPEC.md that the simulated board can be told to make.

A conformance suite that never fails proves nothing; these let tests/test_conform.py make the
board break one requirement on purpose and check that ``tetherloop conform`` reports exactly
that one. Each quirk names the SPEC requirement it breaks (section "Conformance"). They are
reachable only through :class:`~.board.Firmware`'s ``quirks`` argument (or attribute) and the
hidden test option of ``tetherloop conform``; no user command offers them.
"""

from __future__ import annotations

QUIRKS: dict[str, str] = {
    "drop-frame-after-oversize": "FRM-2: the first frame after an oversize piece is lost",
    "ack-trailing-byte": "ENC-2: every Ack carries one byte after its last field",
    "busy-as-wrong-state": "STA-1: SettingWrite/ExperimentStart while RUNNING are refused "
                           "WRONG_STATE, not BUSY",
    "cache-seq-only": "CACHE-2: the reply cache answers a retry on its seq alone",
    "arm-ignores-operator-flag": "ARM-4: ArmConfirm accepts operator_confirmed != 1",
    "watchdog-late": "WD-1: the watchdog expires after twice watchdog_s",
    "malformed-kill-reason-zero": "KILL-4: a Kill that does not decode reports reason 0",
    "telemetry-counter-skip": "TEL-2: the sample counter skips a value every 50 samples",
    "accept-above-maximum": "SET-3: SettingWrite accepts values above the maximum",
    "stop-any-tag": "EXP-4: ExperimentStop with another tag stops the running experiment",
    "state-changed-tag-zero": "EVT-1: STATE_CHANGED on entering RUNNING carries tag 0",
}


def check_quirks(quirks) -> frozenset[str]:
    """The quirks as a frozenset; raises ValueError naming an unknown one and the known ones."""
    q = frozenset(quirks or ())
    unknown = sorted(q - set(QUIRKS))
    if unknown:
        raise ValueError(f"unknown board quirk(s) {', '.join(unknown)}; known: "
                         f"{', '.join(sorted(QUIRKS))}")
    return q
