"""Phantom physics against the inversion-recovery signal equation and cited tissue values."""

from __future__ import annotations

import itertools
import math

import pytest

from flairwatch.phantom.physics import (
    CITED_RANGES_MS,
    TISSUES,
    ir_mz,
    ir_signal,
    lesion_tissue,
    null_ti_ms,
    se_signal,
    tissue_table,
)


@pytest.mark.parametrize("t1", [646.0, 1607.0, 4400.0])
def test_null_at_t1_ln2_for_long_tr(t1: float) -> None:
    # Inversion recovery, standard MRI physics: for TR >> T1, Mz(TI) = 0 at TI = T1 ln 2.
    tr = 1e7
    assert null_ti_ms(t1, tr) == pytest.approx(t1 * math.log(2.0), rel=1e-9)
    assert abs(float(ir_mz(t1, tr, t1 * math.log(2.0)))) < 1e-12


@pytest.mark.parametrize(("t1", "tr"), [(4400.0, 5000.0), (4400.0, 9000.0), (4200.0, 11000.0)])
def test_null_finite_tr(t1: float, tr: float) -> None:
    # Finite TR: null at TI = T1 ln(2 / (1 + exp(-TR/T1))) (same equation, Mz = 0 solved for TI).
    ti = t1 * math.log(2.0 / (1.0 + math.exp(-tr / t1)))
    assert null_ti_ms(t1, tr) == pytest.approx(ti, rel=1e-12)
    assert abs(float(ir_mz(t1, tr, ti))) < 1e-12
    # The finite-TR null lies below T1 ln 2, and missing it leaves signal (incomplete nulling).
    assert ti < t1 * math.log(2.0)
    assert abs(float(ir_mz(t1, tr, 0.9 * ti))) > 0.02
    assert abs(float(ir_mz(t1, tr, 1.1 * ti))) > 0.02


@pytest.mark.parametrize(
    ("field", "tr", "te"),
    [
        (1.5, 9000.0, 110.0),
        (3.0, 9000.0, 120.0),
        (3.0, 11000.0, 100.0),
        (1.5, 10000.0, 130.0),
        (3.0, 5000.0, 150.0),
    ],
)
def test_flair_contrast_order(field: float, tr: float, te: float) -> None:
    # Typical FLAIR settings (common practice: TI at the CSF null): even faint lesions are
    # brighter than GM and WM, and CSF is the darkest brain tissue.
    tab = tissue_table(field)
    ti = null_ti_ms(tab["csf"].t1_ms, tr)
    s = {k: ir_signal(v, tr, ti, te) for k, v in tab.items()}
    faint = ir_signal(lesion_tissue(0.0, field), tr, ti, te)
    bright = ir_signal(lesion_tissue(1.0, field), tr, ti, te)
    assert faint > s["gm"] and faint > s["wm"]
    assert bright > faint
    assert s["csf"] < 0.01 * s["wm"]
    assert s["csf"] < min(s["gm"], s["wm"], faint)
    # Faint lesions about 1.2-1.6x WM (more at longer TE), bright ones about 2x or more (the
    # generator's design range).
    assert 1.15 < faint / s["wm"] < 1.65
    assert bright / s["wm"] > 1.8


@pytest.mark.parametrize(("key", "bounds"), sorted(CITED_RANGES_MS.items()))
def test_tissue_values_within_cited_ranges(
    key: tuple[float, str, str], bounds: tuple[float, float]
) -> None:
    # Sources beside CITED_RANGES_MS: MAGMA 2008;21:121-130 for WM/GM T1 at 1.5 and 3 T,
    # published 3 T CSF relaxometry, WM/GM T2 at 3 T from memory.
    field, tissue, which = key
    value = getattr(TISSUES[field][tissue], f"{which}_ms")
    assert bounds[0] <= value <= bounds[1]


def test_exact_published_t1() -> None:
    # MAGMA 2008;21:121-130: WM 646 / GM 1197 ms at 1.5 T, WM 838 / GM 1607 ms at 3 T.
    assert TISSUES[1.5]["wm"].t1_ms == 646.0 and TISSUES[1.5]["gm"].t1_ms == 1197.0
    assert TISSUES[3.0]["wm"].t1_ms == 838.0 and TISSUES[3.0]["gm"].t1_ms == 1607.0


@pytest.mark.parametrize("field", [1.5, 3.0])
def test_t1_weighted_spin_echo_order(field: float) -> None:
    # Common practice: on T1-weighted spin echo (short TR/TE) WM > GM > CSF.
    tab = tissue_table(field)
    s = {k: se_signal(tab[k], 550.0, 12.0) for k in ("wm", "gm", "csf")}
    assert s["wm"] > s["gm"] > s["csf"]


JITTER_CORNERS = [
    (c1 * e[0], c2 * e[1], c1 * e[2], c2 * e[3])
    for c1, c2 in itertools.product((0.94, 1.06), repeat=2)
    for e in itertools.product((0.98, 1.02), repeat=4)
]


@pytest.mark.parametrize("field", [1.5, 3.0])
@pytest.mark.parametrize(
    ("tr", "te"), [(8000.0, 90.0), (11000.0, 130.0), (4800.0, 165.0), (6500.0, 135.0)]
)
def test_contrast_order_holds_under_jitter(field: float, tr: float, te: float) -> None:
    # The generator varies WM/GM T1 and T2 per head (params._draw_jitter bounds: shared +-6 %,
    # per tissue +-2 %). Over the generator's TR/TE range, with TI at the CSF null (common
    # practice) or 9 % short / 5 % long, faint lesions stay brighter than GM and WM and CSF
    # stays darkest (inversion-recovery equation, MAGMA 2008 T1 values).
    for jitter in JITTER_CORNERS:
        tab = tissue_table(field, jitter)
        for ti_error in (-0.09, 0.0, 0.05):
            ti = null_ti_ms(tab["csf"].t1_ms, tr) * (1.0 + ti_error)
            s = {k: ir_signal(v, tr, ti, te) for k, v in tab.items()}
            faint = ir_signal(lesion_tissue(0.0, field, jitter), tr, ti, te)
            assert faint > max(s["gm"], s["wm"]) > s["csf"]
