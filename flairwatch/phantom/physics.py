"""MR signal equations and the tissue relaxation table the phantom generator uses.

All times are in milliseconds, proton density (PD) is relative to pure water (CSF = 1).
Every tissue value names its source beside it: a citation, or "from memory" when it was
recalled rather than looked up, so that a reader knows which numbers to check first.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

FloatArray = npt.NDArray[np.float32]


@dataclass(frozen=True)
class Tissue:
    """Relaxation and density of one tissue at one field strength.

    Parameters
    ----------
    t1_ms, t2_ms : float
        Longitudinal and transverse relaxation times in ms.
    pd : float
        Proton density relative to water (0..1).
    """

    t1_ms: float
    t2_ms: float
    pd: float


# Sources:
# [W08]  Wright PJ et al., "Water proton T1 measurements in brain tissue at 7, 3, and 1.5 T
#        using IR-EPI, IR-TSE, and MPRAGE", MAGMA 2008;21:121-130: WM 646 / GM 1197 ms at 1.5 T,
#        WM 838 / GM 1607 ms at 3 T.
# [CSF3] published CSF relaxometry at 3 T: T1 about 4300-4450 ms, T2 about 1900-2400 ms.
# [mem]  from memory (textbook ranges), to be checked against a handbook.
# Fat T2 is an *apparent* fast-spin-echo value: J-coupling is broken up by the echo train, so
# fat looks far brighter on FSE FLAIR than its single-echo T2 (~70 ms) predicts (common practice).
TISSUES: dict[float, dict[str, Tissue]] = {
    1.5: {
        "wm": Tissue(t1_ms=646.0, t2_ms=80.0, pd=0.69),  # T1 [W08]; T2, PD [mem]
        "gm": Tissue(t1_ms=1197.0, t2_ms=100.0, pd=0.80),  # T1 [W08]; T2, PD [mem]
        "csf": Tissue(t1_ms=4200.0, t2_ms=2000.0, pd=1.00),  # T1, T2 [mem] (~4000-4500 at 1.5 T)
        "fat": Tissue(t1_ms=260.0, t2_ms=165.0, pd=0.90),  # T1 [mem]; apparent FSE T2 [mem]
        "muscle": Tissue(t1_ms=1000.0, t2_ms=42.0, pd=0.70),  # [mem]
        "marrow": Tissue(t1_ms=300.0, t2_ms=120.0, pd=0.55),  # diploe, fatty marrow [mem]
        "bone": Tissue(t1_ms=250.0, t2_ms=1.0, pd=0.05),  # cortical bone: no signal [mem]
    },
    3.0: {
        "wm": Tissue(t1_ms=838.0, t2_ms=80.0, pd=0.69),  # T1 [W08]; T2 [mem] (~80 ms); PD [mem]
        "gm": Tissue(t1_ms=1607.0, t2_ms=110.0, pd=0.80),  # T1 [W08]; T2 [mem] (~110); PD [mem]
        "csf": Tissue(t1_ms=4400.0, t2_ms=2100.0, pd=1.00),  # [CSF3]
        "fat": Tissue(t1_ms=380.0, t2_ms=150.0, pd=0.90),  # T1 [mem]; apparent FSE T2 [mem]
        "muscle": Tissue(t1_ms=1400.0, t2_ms=35.0, pd=0.70),  # [mem]
        "marrow": Tissue(t1_ms=400.0, t2_ms=110.0, pd=0.55),  # [mem]
        "bone": Tissue(t1_ms=300.0, t2_ms=1.0, pd=0.05),  # [mem]
    },
}

# Ranges the table must stay within (tests check them): the cited/recalled intervals.
CITED_RANGES_MS: dict[tuple[float, str, str], tuple[float, float]] = {
    (1.5, "wm", "t1"): (600.0, 700.0),  # [W08] 646
    (1.5, "gm", "t1"): (1100.0, 1300.0),  # [W08] 1197
    (3.0, "wm", "t1"): (800.0, 880.0),  # [W08] 838
    (3.0, "gm", "t1"): (1550.0, 1650.0),  # [W08] 1607
    (3.0, "csf", "t1"): (4300.0, 4450.0),  # [CSF3]
    (3.0, "csf", "t2"): (1900.0, 2400.0),  # [CSF3]
    (3.0, "wm", "t2"): (70.0, 90.0),  # [mem] ~80
    (3.0, "gm", "t2"): (95.0, 120.0),  # [mem] ~110
}

# Lesion (WMH) relaxation relative to normal WM as a function of a severity s in [0, 1]:
# demyelination / gliosis / oedema lengthen T1 and T2 and raise water content (from memory,
# tuned so that s = 0 gives about 1.2-1.5x and s = 1 about 2-3x the WM signal on typical FLAIR,
# and so that even faint lesions keep a T2 above GM's (brighter than GM at any TE).
LESION_T1_FACTOR = (1.20, 0.50)  # T1 = T1_wm * (a + b s)  [mem, tuned]
LESION_T2_FACTOR = (1.42, 1.70)  # T2 = T2_wm * (a + b s)  [mem, tuned]
LESION_PD_FACTOR = (0.98, 0.14)  # PD = PD_wm * (a + b s)  [mem, tuned]


Jitter = tuple[float, float, float, float]


def tissue_table(field_strength_t: float, jitter: Jitter | None = None) -> dict[str, Tissue]:
    """Return the tissue table for 1.5 T or 3 T (nearest of the two).

    ``jitter`` = (WM T1, WM T2, GM T1, GM T2) multipliers: one head's normal variation
    around the table's population values.
    """
    key = 1.5 if field_strength_t < 2.25 else 3.0
    table = TISSUES[key]
    if jitter is None:
        return table
    wm, gm = table["wm"], table["gm"]
    return {
        **table,
        "wm": Tissue(wm.t1_ms * jitter[0], wm.t2_ms * jitter[1], wm.pd),
        "gm": Tissue(gm.t1_ms * jitter[2], gm.t2_ms * jitter[3], gm.pd),
    }


def lesion_tissue(severity: float, field_strength_t: float, jitter: Jitter | None = None) -> Tissue:
    """Relaxation of a white-matter lesion of the given severity (0 faint .. 1 bright)."""
    wm = tissue_table(field_strength_t, jitter)["wm"]
    s = float(np.clip(severity, 0.0, 1.0))
    return Tissue(
        t1_ms=wm.t1_ms * (LESION_T1_FACTOR[0] + LESION_T1_FACTOR[1] * s),
        t2_ms=wm.t2_ms * (LESION_T2_FACTOR[0] + LESION_T2_FACTOR[1] * s),
        pd=wm.pd * (LESION_PD_FACTOR[0] + LESION_PD_FACTOR[1] * s),
    )


def ir_mz(t1_ms: npt.ArrayLike, tr_ms: float, ti_ms: float) -> npt.NDArray[np.float64]:
    """Longitudinal magnetisation at TI after an inversion, per unit M0 (signed).

    Mz(TI) = 1 - 2 exp(-TI/T1) + exp(-TR/T1) (inversion-recovery signal equation, standard
    MRI physics; assumes full inversion and a 90-degree readout that saturates Mz each TR).
    """
    t1 = np.asarray(t1_ms, dtype=np.float64)
    return 1.0 - 2.0 * np.exp(-ti_ms / t1) + np.exp(-tr_ms / t1)


def ir_signal(tissue: Tissue, tr_ms: float, ti_ms: float, te_ms: float) -> float:
    """Magnitude inversion-recovery (FLAIR) signal: S = PD |Mz(TI)| exp(-TE/T2)."""
    mz = float(ir_mz(tissue.t1_ms, tr_ms, ti_ms))
    return tissue.pd * abs(mz) * math.exp(-te_ms / tissue.t2_ms)


def se_signal(tissue: Tissue, tr_ms: float, te_ms: float) -> float:
    """Spin-echo signal: S = PD (1 - exp(-TR/T1)) exp(-TE/T2) (TE << TR)."""
    return tissue.pd * (1.0 - math.exp(-tr_ms / tissue.t1_ms)) * math.exp(-te_ms / tissue.t2_ms)


def null_ti_ms(t1_ms: float, tr_ms: float) -> float:
    """Inversion time that nulls a tissue: TI = T1 ln(2 / (1 + exp(-TR/T1))).

    For TR >> T1 this tends to T1 ln 2.
    """
    return t1_ms * math.log(2.0 / (1.0 + math.exp(-tr_ms / t1_ms)))


def sequence_signal(
    tissue: Tissue, *, sequence: str, tr_ms: float, te_ms: float, ti_ms: float | None
) -> float:
    """Signal of one tissue for an ``"ir"`` (FLAIR) or ``"se"`` (spin echo) sequence."""
    if sequence == "ir":
        if ti_ms is None:
            raise ValueError("an inversion-recovery sequence needs ti_ms")
        return ir_signal(tissue, tr_ms, ti_ms, te_ms)
    if sequence == "se":
        return se_signal(tissue, tr_ms, te_ms)
    raise ValueError(f"unknown sequence {sequence!r}: use 'ir' or 'se'")


def lesion_signal_lut(
    field_strength_t: float,
    *,
    sequence: str,
    tr_ms: float,
    te_ms: float,
    ti_ms: float | None,
    levels: int = 33,
    jitter: Jitter | None = None,
) -> FloatArray:
    """Lesion signal sampled at ``levels`` severities evenly spaced over 0..1 (float32)."""
    out = [
        sequence_signal(
            lesion_tissue(s, field_strength_t, jitter),
            sequence=sequence,
            tr_ms=tr_ms,
            te_ms=te_ms,
            ti_ms=ti_ms,
        )
        for s in np.linspace(0.0, 1.0, levels)
    ]
    return np.asarray(out, dtype=np.float32)
