"""Domain randomisation used in training (flairwatch.training.randomise and .sampling).

References outside the project: scipy.ndimage (uniform_filter1d for slab averages, shift for
integer translations, sobel for smoothness) and the definition of a monotone map (an intensity
transform that keeps the order of values keeps what is brighter than what: common practice for
intensity augmentation, so that a lesion brighter than white matter stays brighter).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import ndimage

from flairwatch.training import randomise as rz
from flairwatch.training.data import NO_LABEL, CaseData
from flairwatch.training.sampling import hard_negative_weights, sample_batch, sample_crop


def _ramp() -> np.ndarray:
    return np.linspace(0.0, 8.0, 4001, dtype=np.float32)


@pytest.mark.parametrize("gamma", [0.6, 1.0, 1.6])
def test_gamma_keeps_order_and_fixes_reference(gamma: float) -> None:
    out = rz.gamma_curve(_ramp(), gamma)
    assert np.all(np.diff(out) >= 0)  # monotone: order of intensities kept
    assert np.all(np.diff(out[1:]) > 0)  # strictly, away from 0
    assert rz.gamma_curve(np.array([1.0], np.float32), gamma)[0] == pytest.approx(1.0)


def test_contrast_curves_strictly_increase_and_keep_white_matter_near_one() -> None:
    rng = np.random.default_rng(0)
    x = _ramp()
    for _ in range(50):
        out = rz.contrast_curve(x, rng, spread=0.4)
        assert np.all(np.diff(out) > 0)  # beyond the last knot too (x runs to 8)
        assert float(np.interp(1.0, x, out)) == pytest.approx(1.0, abs=1e-5)
        assert out[0] == 0.0


def test_bias_field_is_positive_and_smooth() -> None:
    rng = np.random.default_rng(1)
    for strength in (0.05, 0.3, 0.6):
        field = rz.bias_field((128, 128), strength, rng)
        assert field.shape == (128, 128)
        assert float(field.min()) > 0.0
        # smooth: the log field changes by at most a few % per pixel (scipy's Sobel gradient is
        # 8x the central difference)
        grad = np.hypot(ndimage.sobel(np.log(field), 0), ndimage.sobel(np.log(field), 1)) / 8
        assert float(grad.max()) < 0.05 * max(1.0, strength / 0.3)
        assert float(np.log(field).std()) > 0.0


@pytest.mark.parametrize("thickness", [1, 3, 5])
def test_thick_slices_equal_the_mean_of_adjacent_slices(thickness: int) -> None:
    stack = np.random.default_rng(2).random((9, 6, 5)).astype(np.float32)
    got = rz.thick_slices(stack, thickness)
    # reference: scipy's centred running mean with edges repeated ("nearest")
    ref = ndimage.uniform_filter1d(stack, size=thickness, axis=0, mode="nearest")
    np.testing.assert_allclose(got, ref, atol=1e-6)
    if thickness == 3:
        np.testing.assert_allclose(got[4], stack[3:6].mean(axis=0), atol=1e-6)


def test_even_thickness_takes_the_extra_slice_above() -> None:
    stack = np.arange(6, dtype=np.float32)[:, None, None] * np.ones((6, 2, 2), np.float32)
    got = rz.thick_slices(stack, 2)
    np.testing.assert_allclose(got[:, 0, 0], [0.5, 1.5, 2.5, 3.5, 4.5, 5.0])


def test_tissue_remap_multiplies_each_class_by_its_factor() -> None:
    rng = np.random.default_rng(3)
    x = rng.random((3, 20, 20)).astype(np.float32) + 0.5
    tissue = rng.integers(0, 6, size=(3, 20, 20)).astype(np.uint8)
    tissue[0, :5] = rz.UNKNOWN
    factors = rz.random_tissue_factors(rng)
    got = rz.remap_tissues(x, tissue, factors, smooth_px=0.0)
    expected = x * np.where(tissue == rz.UNKNOWN, 1.0, factors[np.minimum(tissue, 5)])
    np.testing.assert_allclose(got, expected, rtol=1e-6)
    # a lesion keeps its contrast to white matter within 0.9 to 1.15
    for _ in range(200):
        f = rz.random_tissue_factors(rng)
        assert 0.9 - 1e-6 <= f[rz.WMH] / f[rz.WM] <= 1.15 + 1e-6


def test_warp_moves_labels_by_nearest_neighbour() -> None:
    labels = np.zeros((40, 40), np.uint8)
    labels[10:20, 12:25] = 1
    labels[25:30, 5:9] = 2
    # an integer translation: reference is scipy.ndimage.shift with order 0
    yy, xx = np.meshgrid(np.arange(40.0), np.arange(40.0), indexing="ij")
    coords = np.stack([yy - 3, xx + 2]).astype(np.float32)
    got = rz.warp(labels, coords, labels=True)
    ref = ndimage.shift(labels, (3, -2), order=0, mode="nearest")
    np.testing.assert_array_equal(got, ref)
    # a random warp only ever yields values that were there (no blending of labels)
    rng = np.random.default_rng(4)
    for _ in range(5):
        warped = rz.warp(labels, rz.random_warp((40, 40), rng), labels=True)
        assert set(np.unique(warped)) <= {0, 1, 2}
        assert warped.dtype == np.uint8


def test_intensity_randomisation_never_touches_labels_or_brightens_lesions() -> None:
    rng = np.random.default_rng(5)
    x = np.full((3, 64, 64), 1.0, np.float32)
    tissue = np.full((3, 64, 64), rz.WM, np.uint8)
    tissue[:, :, :20] = rz.GM
    tissue[:, :, 40:] = rz.CSF
    lesion = np.zeros((64, 64), bool)
    lesion[30:34, 30:34] = True
    before = (x.copy(), tissue.copy(), lesion.copy())
    for _ in range(20):
        out = rz.randomise_intensities(x, tissue, lesion, rng)
        assert out.shape == x.shape and out.dtype == np.float32
        assert np.isfinite(out).all()
        bright = rz.bright_lookalikes(x, tissue, lesion, rng)
        assert np.all(bright[:, lesion] == x[:, lesion])
        # look-alikes go on grey matter and fluid; flow spots never on white matter
        assert np.all(bright[1][tissue[1] == rz.WM] == 1.0)
    np.testing.assert_array_equal(x, before[0])
    np.testing.assert_array_equal(tissue, before[1])
    np.testing.assert_array_equal(lesion, before[2])


def _case(k: int = 12, slice_mm: float = 1.0) -> CaseData:
    rng = np.random.default_rng(6)
    image = (1.0 + 0.05 * rng.standard_normal((k, 64, 64))).astype(np.float16)
    wmh = np.zeros((k, 64, 64), np.uint8)
    wmh[4:8, 20:30, 20:30] = 1
    image[wmh == 1] = 1.8
    vent = np.zeros((k, 64, 64), np.uint8)
    vent[:, 40:50, 40:50] = 1
    return CaseData(
        name="c",
        image=image,
        wmh=wmh,
        icv=np.ones((k, 64, 64), np.uint8),
        lesion_slices=np.arange(4, 8),
        head_slices=np.arange(k),
        vent=vent,
        slice_mm=slice_mm,
    )


def test_crop_without_randomisation_is_a_plain_crop() -> None:
    case = _case()
    rng = np.random.default_rng(7)
    for _ in range(10):
        x, (wmh, icv, vent) = sample_crop(case, rng, crop=32, channels=3, do_augment=False)
        # find the window by matching the centre channel against the case (reference: slicing)
        hits = [
            (k, y, z)
            for k in range(1, case.image.shape[0] - 1)
            for y in range(33)
            for z in range(33)
            if np.array_equal(case.wmh[k, y : y + 32, z : z + 32], wmh)
            and np.array_equal(case.image[k, y : y + 32, z : z + 32].astype(np.float32), x[1])
        ]
        assert hits
        k, y, z = hits[0]
        np.testing.assert_array_equal(x[0], case.image[k - 1, y : y + 32, z : z + 32])
        np.testing.assert_array_equal(vent, case.vent[k, y : y + 32, z : z + 32])  # type: ignore[index]
        assert icv.all()


def test_batch_has_ventricle_targets_and_unknown_ones_weigh_zero() -> None:
    rng = np.random.default_rng(8)
    case = _case()
    unknown = CaseData(
        name="u",
        image=case.image,
        wmh=case.wmh,
        icv=np.full(case.icv.shape, NO_LABEL, np.uint8),
        lesion_slices=case.lesion_slices,
        head_slices=case.head_slices,
    )
    b = sample_batch([case, unknown], rng, batch_size=8, crop=32, channels=3)
    assert b.x.shape == (8, 3, 32, 32)
    for arr in (b.wmh, b.vent, b.icv):
        assert set(np.unique(arr)) <= {0.0, 1.0}
    # each crop is either fully weighted (known masks) or not at all (unknown)
    per_crop = b.vent_weight.reshape(8, -1)
    assert set(per_crop.min(axis=1)) == set(per_crop.max(axis=1))
    assert np.array_equal(per_crop.max(axis=1), b.icv_weight.reshape(8, -1).max(axis=1))


def test_lesion_free_cases_are_drawn_more_often() -> None:
    with_lesions, free = _case(), _case()
    free.lesion_slices = np.array([], dtype=np.int64)
    w = hard_negative_weights([with_lesions, free], lesion_free_factor=2.0)
    np.testing.assert_allclose(w, [1 / 3, 2 / 3])


def test_fade_lesions_reaches_the_target_ratio_and_leaves_other_tissue_alone() -> None:
    # A 3-slice crop: white matter at 1.0 with mild noise, a 12-pixel-radius lesion at 1.8 x WM,
    # grey matter at 1.1 elsewhere. The target is a ratio of medians, checked with numpy's median.
    rng = np.random.default_rng(3)
    yy, xx = np.mgrid[:64, :64]
    lesion = (yy - 32) ** 2 + (xx - 32) ** 2 <= 12**2
    tissue = np.full((3, 64, 64), rz.WM, np.uint8)
    tissue[:, :, :8] = rz.GM
    tissue[:, lesion] = rz.WMH
    x = np.where(tissue == rz.WMH, 1.8, np.where(tissue == rz.GM, 1.1, 1.0)).astype(np.float32)
    x = x + rng.normal(0, 0.02, x.shape).astype(np.float32)
    out = rz.fade_lesions(x, tissue, 1.15)
    wm = float(np.median(out[tissue == rz.WM]))
    assert float(np.median(out[tissue == rz.WMH])) / wm == pytest.approx(1.15, abs=0.02)
    far = (tissue != rz.WMH) & ~ndimage.binary_dilation(tissue == rz.WMH, iterations=4)
    np.testing.assert_array_equal(out[far], x[far])  # only lesions (and their soft rims) change
    assert np.all(out <= x + 1e-6)  # lesions only ever get fainter
    # a target above the lesion's own contrast leaves the crop unchanged
    np.testing.assert_array_equal(rz.fade_lesions(x, tissue, 2.5), x)


def test_fluid_levels_set_csf_and_ventricles_relative_to_white_matter() -> None:
    # White matter 1.0, sulcal CSF 0.2 and ventricles 0.1 (a well-nulled FLAIR, common practice),
    # mild noise; afterwards the class medians (numpy's median) are the asked multiples of WM's.
    rng = np.random.default_rng(5)
    tissue = np.full((3, 64, 64), rz.WM, np.uint8)
    tissue[:, :, :10] = rz.CSF
    tissue[:, 20:52, 20:52] = rz.VENTRICLE
    base = np.where(tissue == rz.CSF, 0.2, np.where(tissue == rz.VENTRICLE, 0.1, 1.0))
    x = (base + rng.normal(0, 0.01, base.shape)).astype(np.float32)
    out = rz.fluid_levels(x, tissue, 1.2, 0.9)
    wm = float(np.median(out[tissue == rz.WM]))
    assert float(np.median(out[tissue == rz.CSF])) / wm == pytest.approx(1.2, abs=0.02)
    assert float(np.median(out[tissue == rz.VENTRICLE])) / wm == pytest.approx(0.9, abs=0.02)
    # the factor map is smoothed with a Gaussian of 0.7 px truncated at 4 sigma (scipy's default):
    # white matter more than 3 pixels (chessboard distance) from fluid is untouched
    square = np.zeros((1, 3, 3), bool)
    square[0] = True
    fluid = ndimage.binary_dilation(tissue != rz.WM, structure=square, iterations=4)
    np.testing.assert_array_equal(out[~fluid], x[~fluid])
    # order within a class is kept: one positive factor per class
    vent = tissue == rz.VENTRICLE
    inner = vent & ~ndimage.binary_dilation(~vent, iterations=4)
    assert np.array_equal(np.argsort(out[inner]), np.argsort(x[inner]))


def test_motion_ghosts_are_shifted_attenuated_copies_along_one_axis() -> None:
    # A single bright pixel: each ghost is numpy.roll's copy at its shift, scaled by its
    # amplitude, and nothing appears along the other axis (ghosts follow phase encoding only).
    x = np.zeros((3, 32, 32), np.float32)
    x[:, 10, 12] = 1.0
    out = rz.motion_ghosts(x, (5, -9), (0.2, 0.1), axis=1)
    expected = x + 0.2 * np.roll(x, 5, axis=1) + 0.1 * np.roll(x, -9, axis=1)
    np.testing.assert_allclose(out, expected, rtol=1e-6)
    assert out[1, 15, 12] == pytest.approx(0.2) and out[1, 1, 12] == pytest.approx(0.1)
    assert np.count_nonzero(out[1, :, :12]) == 0 and np.count_nonzero(out[1, :, 13:]) == 0
    np.testing.assert_array_equal(x[:, 10, 12], 1.0)  # the input is not changed in place


def test_motion_during_scan_follows_the_fourier_shift_theorem() -> None:
    # Fourier shift theorem (any signal-processing handbook): the same displacement on every
    # k-space line is a plain translation, here compared with numpy.roll; no displacement
    # leaves the image as it was.
    rng = np.random.default_rng(4)
    x = rng.random((2, 32, 24)).astype(np.float32)
    np.testing.assert_allclose(
        rz.motion_during_scan(x, np.full(32, 3.0), axis=1), np.roll(x, 3, axis=1), atol=1e-5
    )
    np.testing.assert_allclose(
        rz.motion_during_scan(x, np.full(24, -5.0), axis=2), np.roll(x, -5, axis=2), atol=1e-5
    )
    np.testing.assert_allclose(rz.motion_during_scan(x, np.zeros(24), axis=2), x, atol=1e-5)
    with pytest.raises(ValueError, match="one displacement per line"):
        rz.motion_during_scan(x, np.zeros(24), axis=1)


def test_motion_during_scan_keeps_energy_and_ghosts_only_along_phase_encoding() -> None:
    # Parseval's theorem: a phase change per k-space line keeps the image's energy; and the
    # transform acts along one axis only, so a bright pixel's ghosts stay in its own column
    # (ghosts follow the phase-encoding direction, common practice).
    x = np.zeros((1, 64, 48), np.float32)
    x[0, 20, 12] = 1.0
    rng = np.random.default_rng(7)
    for _ in range(5):
        out = rz.motion_during_scan(x, rz.random_trajectory(64, rng), axis=1)
        assert float(np.sum(out.astype(np.float64) ** 2)) == pytest.approx(1.0, rel=1e-4)
        assert np.abs(out[0, :, :12]).max() < 1e-6 and np.abs(out[0, :, 13:]).max() < 1e-6
    # a periodic trajectory moves energy out of the pixel into ghosts along the column
    periodic = 2.0 * np.sin(2 * np.pi * np.arange(64) / 8.0)
    out = rz.motion_during_scan(x, periodic, axis=1)
    assert out[0, 20, 12] < 0.9 and np.count_nonzero(out[0, :, 12] > 0.01) >= 3


def test_random_trajectories_are_bounded_and_of_three_kinds() -> None:
    # A sine's power sits in a few Fourier bins; restless jitter spreads it over many
    # (Wiener-Khinchin: a short correlation means a broad spectrum; common practice).
    rng = np.random.default_rng(11)
    kinds = set()
    for _ in range(60):
        d = rz.random_trajectory(100, rng)
        assert d.shape == (100,) and np.abs(d).max() <= 5.0
        power = np.sort(np.abs(np.fft.rfft(d)) ** 2)[::-1]
        top3 = float(power[:3].sum() / power.sum())
        if len(np.unique(d)) == 2:
            kinds.add("step")
        elif top3 > 0.85:
            kinds.add("periodic")
        elif top3 < 0.6:
            kinds.add("restless")
    assert kinds == {"step", "periodic", "restless"}
