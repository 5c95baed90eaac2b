"""Cascade check: an inner loop should be 5–10 times faster than the loop around it
(common practice, no source)."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["CascadeCheck", "cascade_check"]


@dataclass(frozen=True)
class CascadeCheck:
    """Bandwidth ratio inner/outer, whether it is at least ``min_ratio``, and a message."""

    ratio: float
    ok: bool
    message: str

    def to_dict(self) -> dict:
        """JSON-ready dictionary (floats, lists, strings)."""
        return {"ratio": float(self.ratio), "ok": bool(self.ok), "message": self.message}


def cascade_check(inner_bandwidth_rad_s: float, outer_bandwidth_rad_s: float,
                  min_ratio: float = 5.0) -> CascadeCheck:
    """Compare closed-loop bandwidths (rad/s) of an inner loop and the loop around it.

    Parameters
    ----------
    inner_bandwidth_rad_s, outer_bandwidth_rad_s : float
        Closed-loop bandwidths of the inner loop and of the loop around it (rad/s).
    min_ratio : float
        Smallest acceptable inner/outer ratio.

    Returns
    -------
    CascadeCheck

    Raises
    ------
    ValueError
        If a bandwidth is not a positive finite number.
    """
    wi, wo = float(inner_bandwidth_rad_s), float(outer_bandwidth_rad_s)
    for name, v in (("inner", wi), ("outer", wo)):
        if not (np.isfinite(v) and v > 0):
            raise ValueError(f"The {name} loop bandwidth is {v}; expected a positive number in "
                             "rad/s (tune and identify that loop first).")
    ratio = wi / wo
    if ratio >= min_ratio:
        msg = (f"The inner loop is {ratio:.1f}x faster than the outer loop "
               f"(at least {min_ratio:g}x is common practice): the cascade is well separated.")
        return CascadeCheck(ratio, True, msg)
    msg = (f"The inner loop is only {ratio:.1f}x faster than the outer loop; common practice "
           f"asks for {min_ratio:g}-10x. Speed up the inner loop or slow the outer loop down "
           "(lower its gains), or the two loops will fight.")
    return CascadeCheck(ratio, False, msg)
