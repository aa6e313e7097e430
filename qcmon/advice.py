"""What a warning or an alarm likely means and what to check, in one or two plain sentences.

The text is qcmon's own. It names the measured value in the unit shown on screen, the likely causes and the
next thing to look at. qcmon only advises: advice that touches laser power, detector gain or the animal comes
with the profile's caution (returned beside the text, and flagged in it with "see caution"), and never tells the
user to exceed local rules. Thresholds and their sources are in the profiles (``thresholds/*.toml``).
"""

from __future__ import annotations

import math
from typing import Mapping

__all__ = ["advice_for", "idle_advice"]

#: Said beside every advice that touches the excitation, the detector gain or the animal.
SEE_CAUTION = "(see caution: qcmon never changes the microscope; follow your local rules)"


def _num(v: float, digits: int = 2) -> str:
    return f"{v:.{digits}g}" if abs(v) < 10 ** digits else f"{v:.0f}"


def _clock(t: float) -> str:
    if not math.isfinite(t):
        return "?"
    s = int(round(max(t, 0.0)))
    m, s = divmod(s, 60)
    h, m = divmod(m, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def advice_for(limit, state: str, *, typical: float, peak: float, time_s: float,
               row: Mapping[str, object], caution: str, lasting: bool = True) -> tuple[str, str]:
    """Advice for a metric entering ``state``.

    Parameters
    ----------
    limit : qcmon.thresholds.Limit
        The metric's levels (metric, direction, unit).
    state : str
        "warning" or "alarm".
    typical, peak : float
        The median and the most extreme value (file units) while beyond the level in the tracker's window.
    time_s : float
        Session time of the event.
    row : mapping
        The row that caused the event (other columns are used where they help, e.g. ``photons_per_px``).
    caution : str
        The profile's caution text.
    lasting : bool
        True when the excursion has been one unbroken stretch (a lasting shift), False when the level was
        crossed again and again (a burst).

    Returns
    -------
    advice, caution : str
        The advice, and ``caution`` when the advice touches laser power, gain or the animal (else "").
    """
    m = limit.metric
    show = limit.show
    make = _ADVICE.get(m)
    if make is None:
        text, touchy = (f"{limit.label} {limit.describe(state)}: {show(typical)} — check the live image and the "
                        f"microscope's settings for what changed at {_clock(time_s)}."), False
    else:
        text, touchy = make(limit, state, typical, peak, time_s, {**row, "_lasting": lasting})
    if touchy:
        return f"{text} {SEE_CAUTION}", caution
    return text, ""


def _displacement(limit, state, typical, peak, t, row):
    if row.get("_lasting", True):
        return (f"the field sits {limit.show(typical)} away from the reference — a lasting shift: the stage, "
                f"the head fixation or the preparation may have moved. Check them; if the new position is "
                f"intended, press r for a new reference."), True
    return (f"the field moves back and forth by up to {limit.show(peak)} (typical {limit.show(typical)}) — the "
            f"animal is probably moving (running, grooming, struggling) or breathing/heartbeat shake a loose "
            f"preparation. Check the animal and the head fixation; frames of this stretch are listed in "
            f"exclude.csv."), True


def _z(limit, state, typical, peak, t, row):
    side, back = ("deeper", "toward the surface") if typical > 0 else ("shallower", "deeper")
    return (f"focal plane {limit.show(abs(typical))} {side} than at the start — refocus {limit.show(abs(typical))} "
            f"{back}, then press r; a steady drift often means the brain swells or the immersion water "
            f"evaporates."), False


def _focus(limit, state, typical, peak, t, row):
    return (f"the field matches the reference less (correlation {limit.show(typical)}) — focus drift, a change "
            f"of the tissue or of the objective's water. Compare the live image with the reference; refocus "
            f"if the cells look different, then press r."), False


def _saturated(limit, state, typical, peak, t, row):
    return (f"{limit.show(typical)} of pixels saturated in the last {_num(2 * limit.persist_s)} s (peak "
            f"{limit.show(peak)}) — bright cells lose their top: lower the detector gain or the excitation."), True


def _clipped(limit, state, typical, peak, t, row):
    return (f"{limit.show(typical)} of pixels clipped at the floor — the dark level sits below zero: raise the "
            f"detector offset (or check the digitiser's offset), otherwise dim signals are lost."), False


def _bleach(limit, state, typical, peak, t, row):
    return (f"brightness falls {_num(abs(typical))} %/min — bleaching or photodamage, or the immersion water "
            f"is drying. Check the water; consider less excitation or a slower frame rate."), True


def _brightness(limit, state, typical, peak, t, row):
    return (f"brightness at {_num(typical)} % of the start — bleaching, drying immersion water, a laser power "
            f"drop or a change of focus. Check the water, the laser power reading and the focus."), True


def _snr(limit, state, typical, peak, t, row):
    photons = row.get("photons_per_px")
    try:
        photons = float(photons)
    except (TypeError, ValueError):
        photons = math.nan
    head = (f"photons per pixel fell to {_num(photons)} (SNR {_num(typical)})" if math.isfinite(photons)
            else f"SNR {_num(typical)} per pixel")
    return (f"{head} — too low to see single spikes. Check the focus and the immersion water, the detector "
            f"and the excitation."), True


def _line(limit, state, typical, peak, t, row):
    return (f"odd and even lines are {limit.show(abs(typical))} apart — the bidirectional scan phase is off: "
            f"adjust the scan phase (line correction) of the scanner."), False


def _reg(limit, state, typical, peak, t, row):
    return (f"frames match the reference poorly (correlation {limit.show(typical)}) — the field changed "
            f"(focus, large motion or a different region). Check the live image; press r once it is right."), False


_ADVICE = {
    "displacement_um": _displacement,
    "displacement_px": _displacement,
    "z_um": _z,
    "focus_corr": _focus,
    "saturated_frac": _saturated,
    "clipped_frac": _clipped,
    "bleach_pct_per_min": _bleach,
    "brightness_pct": _brightness,
    "snr": _snr,
    "line_offset_px": _line,
    "reg_corr": _reg,
}


def idle_advice(seconds: float) -> str:
    """Advice for an idle watch: no new frame for ``seconds``."""
    return (f"no new frame for {seconds:.0f} s — the acquisition paused or stopped, or it writes elsewhere. "
            f"Check the microscope; qcmon keeps watching and measures new frames as they arrive.")
