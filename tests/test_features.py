"""The ONNX feature graph against direct implementations of the published definitions."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.signal import periodogram
from scipy.spatial.transform import Rotation

from gateway.features import FeatureExtractor, FeatureSpec, build_feature_graph

FS = 10.0
T = 100
SPEC = FeatureSpec(FS, T)
IDX = {n: i for i, n in enumerate(SPEC.names)}


@pytest.fixture(scope="module")
def extract() -> FeatureExtractor:
    return FeatureExtractor(SPEC)


def windows(n: int, seed: int = 0) -> np.ndarray:
    """Tilted gravity plus tones and noise of collar-like size (0.05-0.5 g)."""
    rng = np.random.default_rng(seed)
    t = np.arange(T) / FS
    x = np.empty((n, 3, T))
    for i in range(n):
        g = Rotation.random(random_state=rng.integers(1 << 31)).apply([0.0, 0.0, 1.0])
        f = rng.uniform(0.3, 4.5, 3)
        amp = rng.uniform(0.05, 0.5, 3)
        x[i] = g[:, None] + amp[:, None] * np.sin(
            2 * np.pi * f[:, None] * t + rng.uniform(0, 6, (3, 1))
        )
        x[i] += rng.normal(0, 0.03, (3, T))
    return x.astype(np.float32)


def static_numpy(x: np.ndarray, k: int) -> np.ndarray:
    """Running mean over k samples centred on each sample, edges over the samples there."""
    h = k // 2
    out = np.empty_like(x, dtype=np.float64)
    for j in range(x.shape[-1]):
        out[..., j] = x[..., max(0, j - h) : j + h + 1].mean(axis=-1)
    return out


def test_vedba_and_odba_match_the_definitions(extract: FeatureExtractor) -> None:
    x = windows(64)
    f = extract(x)
    d = x.astype(np.float64) - static_numpy(x, SPEC.static_len)
    # Qasem et al. 2012, PLoS ONE: VeDBA = sqrt(dx^2+dy^2+dz^2), ODBA = |dx|+|dy|+|dz|
    vedba = np.sqrt((d**2).sum(axis=1))
    odba = np.abs(d).sum(axis=1)
    assert np.abs(f[:, IDX["vedba_mean"]] - vedba.mean(axis=1)).max() <= 1e-4
    assert np.abs(f[:, IDX["vedba_std"]] - vedba.std(axis=1)).max() <= 1e-4
    assert np.abs(f[:, IDX["vedba_max"]] - vedba.max(axis=1)).max() <= 1e-4
    assert np.abs(f[:, IDX["odba_mean"]] - odba.mean(axis=1)).max() <= 1e-4
    # Always VeDBA <= ODBA <= sqrt(3) VeDBA (FIELD.md, methods), per sample and on means.
    assert (vedba <= odba + 1e-12).all() and (odba <= np.sqrt(3) * vedba + 1e-12).all()
    v, o = f[:, IDX["vedba_mean"]], f[:, IDX["odba_mean"]]
    assert (v <= o + 1e-6).all() and (o <= np.sqrt(3) * v + 1e-6).all()


def test_vedba_is_unchanged_by_a_fixed_rotation(extract: FeatureExtractor) -> None:
    # Qasem et al. 2012: VeDBA does not depend on how the logger is oriented.
    x = windows(32, seed=1)
    r = Rotation.from_euler("xyz", [37, -64, 122], degrees=True).as_matrix()
    xr = np.einsum("ij,njt->nit", r, x).astype(np.float32)
    a, b = extract(x), extract(xr)
    for name in ("vedba_mean", "vedba_std", "vedba_max", "mag_mean", "mag_std"):
        assert np.abs(a[:, IDX[name]] - b[:, IDX[name]]).max() <= 1e-4, name


def test_turning_the_collar_about_the_neck_changes_no_robust_feature(
    extract: FeatureExtractor,
) -> None:
    # A roll about the neck axis (x) is a rotation in the y-z plane: magnitudes, neck-axis
    # terms, pitch and the radial power P_y + P_z stay; ODBA is not rotation invariant.
    x = windows(32, seed=2)
    r = Rotation.from_euler("x", 71, degrees=True).as_matrix()
    xr = np.einsum("ij,njt->nit", r, x).astype(np.float32)
    a, b = extract(x), extract(xr)
    for name, i in IDX.items():
        if name == "odba_mean":
            continue
        tol = 1e-3 if name.startswith("logbp") else 1e-4
        assert np.abs(a[:, i] - b[:, i]).max() <= tol, name


def test_band_powers_match_scipy_periodogram(extract: FeatureExtractor) -> None:
    x = windows(48, seed=3)
    f = extract(x)
    d = x.astype(np.float64) - static_numpy(x, SPEC.static_len)
    # scipy.signal.periodogram, boxcar window, one-sided density, no detrending
    freqs, pxx = periodogram(d, fs=FS, window="boxcar", detrend=False, scaling="density", axis=-1)
    df = freqs[1] - freqs[0]
    neck, radial = pxx[:, 0], pxx[:, 1] + pxx[:, 2]
    edges = SPEC.band_edges()
    for b, (lo, hi) in enumerate(zip(edges[:-1], edges[1:], strict=True)):
        last = b == len(edges) - 2
        sel = (freqs >= lo - 1e-9) & ((freqs <= hi + 1e-9) if last else (freqs < hi - 1e-9))
        sel &= freqs > 0
        for part, p in (("neck", neck), ("radial", radial)):
            ours = np.exp(f[:, IDX[f"logbp_{part}_{lo:g}-{hi:g}"]].astype(np.float64)) - 1e-10
            ref = p[:, sel].sum(axis=1) * df
            assert np.abs(ours - ref).max() <= 1e-4, (part, lo, hi)
            assert np.allclose(ours, ref, rtol=1e-3, atol=1e-7), (part, lo, hi)


def test_dominant_frequency_and_pitch() -> None:
    spec = FeatureSpec(FS, T)
    t = np.arange(T) / FS
    pitch = np.deg2rad(40.0)
    x = np.zeros((1, 3, T), dtype=np.float32)
    x[0, 0] = -np.sin(pitch)
    x[0, 2] = np.cos(pitch) + 0.2 * np.sin(2 * np.pi * 1.1 * t)
    f = FeatureExtractor(spec)(x)[0]
    assert f[IDX["dom_freq_hz"]] == pytest.approx(1.1, abs=1e-5)
    # NXP AN3461: pitch = atan2(-ax, sqrt(ay^2 + az^2)), on the static vector
    s = static_numpy(x, spec.static_len)[0]
    ref = np.arctan2(-s[0], np.sqrt(s[1] ** 2 + s[2] ** 2)).mean()
    assert f[IDX["pitch_mean"]] == pytest.approx(ref, abs=1e-4)
    assert f[IDX["pitch_mean"]] == pytest.approx(pitch, abs=0.02)


def test_batches_give_the_same_features() -> None:
    x = windows(23, seed=4)
    a, b = FeatureExtractor(SPEC, batch=5)(x), FeatureExtractor(SPEC)(x)
    assert np.allclose(a, b, rtol=1e-5, atol=1e-5)  # kernels may differ by batch size


def test_still_window_gives_finite_features(extract: FeatureExtractor) -> None:
    x = np.zeros((2, 3, T), dtype=np.float32)
    x[1, 2] = 1.0
    assert np.isfinite(extract(x)).all()


def test_bad_specs_and_shapes_are_refused(extract: FeatureExtractor) -> None:
    with pytest.raises(ValueError, match="hold no DFT bin"):
        FeatureSpec(10.0, 20, bands_hz=(0.2, 0.3, 5.0))
    with pytest.raises(ValueError, match="neck_axis"):
        FeatureSpec(10.0, 100, neck_axis=3)
    with pytest.raises(ValueError, match="too short"):
        FeatureSpec(10.0, 4)
    with pytest.raises(ValueError, match=r"\[N, 3, 100\]"):
        extract(np.zeros((2, 3, 50), dtype=np.float32))


def test_graph_is_small_and_other_rates_build() -> None:
    # The gateway loads this graph for every model; a few hundred kB at most.
    assert len(build_feature_graph(SPEC).SerializeToString()) < 300_000
    spec25 = FeatureSpec(25.0, 250)
    f = FeatureExtractor(spec25)(np.ones((3, 3, 250), dtype=np.float32))
    assert f.shape == (3, len(spec25.names)) and np.isfinite(f).all()
