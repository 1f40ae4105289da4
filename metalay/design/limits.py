"""Verdict thresholds: every figure a compile checks is judged pass, warn or fail against limits with units.

A limit names a figure, its unit, which direction is better, and two thresholds: crossing ``warn`` gives "warn",
crossing ``fail`` gives "fail" (a figure exactly at a threshold has not crossed it). The defaults below are what a
practitioner would accept for a first tape-out; a design overrides any of them in ``[checks.limits]``::

    [checks.limits]
    oam_purity = { warn_below = 0.95, fail_below = 0.8 }
    worst_isolation_db = { warn_below = 25.0, fail_below = 20.0 }

A figure that could not be measured gives "warn" with the reason (never "pass"); a check without figures has no
verdict to give and says so.

Default thresholds and why
--------------------------
==============================  =====  ==========  ==========  =====================================================
key                             unit   warn        fail        why
==============================  =====  ==========  ==========  =====================================================
converted_efficiency            1      < 0.5       < 0.1       power converted into the designed polarisation, of
                                                               the incident power (solver-built dielectric fins
                                                               reach 0.6-0.99, thin plasmonic slots 0.1-0.25)
oam_purity                      1      < 0.9       < 0.7       share of the converted beam in the designed charge;
                                                               K phase levels give sinc^2(1/K): 0.95 at K = 8,
                                                               0.81 at K = 4, 0.41 at K = 2 (Swanson 1989)
worst_isolation_db              dB     < 20        < 15        weakest channel's own spot over its strongest other
                                                               spot (-20 dB crosstalk: common practice)
strehl                          1      < 0.8       < 0.5       focal peak over the aberration-free peak; 0.8 is
                                                               the Marechal criterion (Born & Wolf sec. 9.3)
dropped_fraction                1      > 0         > 0.001     elements left out at write-field edges, of all sites
straddling_fraction             1      > 0         > 0.001     elements written across a field boundary (stitching
                                                               error splits them), of all sites
shift_phase_error_deg           deg    > 10        > 30        worst phase error of an element shifted into a field
snapping_phase_error_deg        deg    > 1         > 5         worst geometric-phase error from grid snapping
quantisation_phase_error_deg    deg    > 25        > 50        pi/K of phase for K levels: K >= 8 passes, K = 4
                                                               warns, K <= 3 fails (consistent with oam_purity)
rule_violations                 count  > 0         > 0         any design-rule violation fails the mask
==============================  =====  ==========  ==========  =====================================================

References
----------
Swanson 1989, MIT Lincoln Laboratory Technical Report 854 (binary optics: first-order efficiency sinc^2(1/N) of an
N-level phase profile).
Born & Wolf, Principles of Optics, 7th ed., sec. 9.3 (Marechal: Strehl ratio 0.8 for an rms wavefront error of
lambda/14).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

__all__ = ["VERDICTS", "Limit", "DEFAULT_LIMITS", "Limits", "judge", "worst_verdict", "verdict_at_least",
           "unmeasured"]

#: Verdicts from best to worst.
VERDICTS = ("pass", "warn", "fail")


@dataclass(frozen=True)
class Limit:
    """Thresholds of one figure.

    Attributes
    ----------
    key : str
        Key in ``[checks.limits]`` (unit in the name where the figure has one).
    what : str
        The figure in words.
    unit : str
        ``"1"`` for a ratio, ``"dB"``, ``"deg"`` or ``"count"``.
    higher_is_better : bool
        True: the figure must stay at or above the thresholds (``warn_below``, ``fail_below``); False: at or below
        (``warn_above``, ``fail_above``).
    warn, fail : float
        Thresholds; for ``higher_is_better`` ``fail <= warn``, otherwise ``fail >= warn``.
    """

    key: str
    what: str
    unit: str
    higher_is_better: bool
    warn: float
    fail: float

    @property
    def words(self) -> tuple[str, str]:
        """Names of the two thresholds in a design file: ``("warn_below", "fail_below")`` or ``(..._above)``."""
        return ("warn_below", "fail_below") if self.higher_is_better else ("warn_above", "fail_above")


# Common practice (no source) except where the module table names one.
DEFAULT_LIMITS = (
    Limit("converted_efficiency", "converted power / incident power", "1", True, 0.5, 0.1),
    Limit("oam_purity", "share of the converted beam in the designed charge", "1", True, 0.9, 0.7),
    Limit("worst_isolation_db", "worst channel isolation", "dB", True, 20.0, 15.0),
    Limit("strehl", "Strehl ratio of the focal spot", "1", True, 0.8, 0.5),
    Limit("dropped_fraction", "elements dropped at write-field edges / sites", "1", False, 0.0, 0.001),
    Limit("straddling_fraction", "elements left straddling a write-field boundary / sites", "1", False, 0.0, 0.001),
    Limit("shift_phase_error_deg", "worst phase error of an element shifted into a write field", "deg", False,
          10.0, 30.0),
    Limit("snapping_phase_error_deg", "worst geometric-phase error from grid snapping", "deg", False, 1.0, 5.0),
    Limit("quantisation_phase_error_deg", "worst phase error from rotation quantisation", "deg", False, 25.0, 50.0),
    Limit("rule_violations", "design-rule violations", "count", False, 0.0, 0.0),
)


@dataclass(frozen=True)
class Limits:
    """The limits of one design: the defaults with the design's overrides (``[checks.limits]``)."""

    items: tuple[Limit, ...] = DEFAULT_LIMITS

    def get(self, key: str) -> Limit:
        for lim in self.items:
            if lim.key == key:
                return lim
        raise KeyError(key)

    def as_dict(self) -> dict:
        """JSON-ready thresholds (manifest echo)."""
        out = {}
        for lim in self.items:
            w, f = lim.words
            out[lim.key] = {w: lim.warn, f: lim.fail, "unit": lim.unit}
        return out


def judge(value, limit: Limit) -> dict:
    """Verdict of one figure against its limit.

    Parameters
    ----------
    value : float or None
        The measured figure (None or NaN: not measured, verdict "warn").
    limit : Limit

    Returns
    -------
    dict
        ``verdict`` ("pass", "warn" or "fail"), ``value``, ``unit``, the two thresholds, ``what`` and a one-line
        ``text`` such as ``"oam_purity 0.405 < 0.7 (fail)"``.

    Examples
    --------
    >>> judge(0.95, Limits().get("oam_purity"))["verdict"]
    'pass'
    """
    w_name, f_name = limit.words
    base = {"key": limit.key, "what": limit.what, "unit": limit.unit, w_name: limit.warn, f_name: limit.fail}
    if value is None or (isinstance(value, float) and not math.isfinite(value)):
        return unmeasured(limit.key, "not measured", base=base)
    v = float(value)
    if limit.higher_is_better:
        verdict = "fail" if v < limit.fail else "warn" if v < limit.warn else "pass"
        op = {"fail": f"< {limit.fail:g}", "warn": f"< {limit.warn:g}", "pass": f">= {limit.warn:g}"}[verdict]
    else:
        verdict = "fail" if v > limit.fail else "warn" if v > limit.warn else "pass"
        op = {"fail": f"> {limit.fail:g}", "warn": f"> {limit.warn:g}", "pass": f"<= {limit.warn:g}"}[verdict]
    unit = "" if limit.unit in ("1", "count") else f" {limit.unit}"
    return {**base, "verdict": verdict, "value": v, "text": f"{limit.key} {v:.4g}{unit} {op} ({verdict})"}


def unmeasured(key: str, reason: str, *, base: dict | None = None) -> dict:
    """A figure that could not be measured: verdict "warn" with the reason (never "pass")."""
    return {**(base or {"key": key}), "verdict": "warn", "value": None, "text": f"{key}: {reason} (warn)"}


def worst_verdict(verdicts) -> str | None:
    """The worst of several verdicts ("fail" > "warn" > "pass"); None for an empty sequence."""
    vs = [v for v in verdicts if v is not None]
    if not vs:
        return None
    return max(vs, key=VERDICTS.index)


def verdict_at_least(verdict: str | None, level: str) -> bool:
    """Whether ``verdict`` is ``level`` or worse (``level`` "never" is never reached)."""
    if verdict is None or level == "never":
        return False
    return VERDICTS.index(verdict) >= VERDICTS.index(level)
