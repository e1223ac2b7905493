"""The feature graph: raw windows in g -> orientation-robust features, as ONNX.

This graph is the one source of truth for features. Training runs it in onnxruntime to
compute its feature table, and the shipped model is this graph with the classifier appended,
so the gateway computes exactly what the classifier was trained on.

Per window of ``T`` samples (collar axes x, y, z; the neck axis is the one the collar turns
around, x by default):

- static component = centred running mean per axis (``static_s`` seconds, edges average the
  samples available); dynamic = raw - static (Wilson et al. 2006; Qasem et al. 2012).
- VeDBA = sqrt(dx^2 + dy^2 + dz^2), ODBA = |dx| + |dy| + |dz| per sample (Qasem et al. 2012).
- magnitude of the raw vector: mean, std, min, max.
- posture from the static vector: pitch = atan2(-s_neck, sqrt(s_a^2 + s_b^2)) (NXP AN3461),
  unchanged by the collar turning around the neck; mean and std over the window.
- the dynamic component along the neck axis and across it (radial), std and band powers.
- band powers: one-sided periodogram through a fixed DFT basis (one MatMul), summed in bands;
  the radial spectrum is P_a + P_b, which a turn of the collar around the neck leaves alone.
- dominant frequency of the whole dynamic spectrum and the share of power in that bin.

Everything that is linear in the input (running mean, dynamic part, DFT) is folded into two
constant matrices, so the graph is two MatMuls plus elementwise work: lean enough for
thousands of windows per second on one core.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import numpy as np

from .model import INPUT_NAME

__all__ = [
    "DEFAULT_BANDS_HZ",
    "FEATURES_OUTPUT",
    "FeatureExtractor",
    "FeatureSpec",
    "build_feature_graph",
    "dft_power_basis",
    "running_mean_matrix",
]

FEATURES_OUTPUT = "features"
# Band edges in Hz around walking strides (~0.7 Hz), bites and chews (~1.0-1.2 Hz)
# (Flower et al. 2006; Braun et al. 2015, FIELD.md); the last band runs to Nyquist.
DEFAULT_BANDS_HZ: tuple[float, ...] = (0.2, 0.5, 0.8, 1.0, 1.2, 1.5, 2.0, 3.0, 5.0)
# Opsets the shipped models use; ORT >= 1.17 (the gateway's floor) runs both.
OPSET = 17
ML_OPSET = 3
_EPS = 1e-10  # keeps logs and square roots finite on a perfectly still window


@dataclass(frozen=True, slots=True)
class FeatureSpec:
    """What the feature graph is built for. ``window_len`` is T, samples per window."""

    sample_rate_hz: float
    window_len: int
    static_s: float = 2.0  # running-mean span for the static component (2-3 s usual, FIELD.md)
    bands_hz: tuple[float, ...] = DEFAULT_BANDS_HZ
    neck_axis: int = 0
    names: tuple[str, ...] = field(init=False, default=())

    def __post_init__(self) -> None:
        if not 1.0 <= self.sample_rate_hz <= 200.0:
            raise ValueError(f"sample_rate_hz={self.sample_rate_hz} is outside 1..200")
        if self.window_len < 8:
            raise ValueError(f"window_len={self.window_len} is too short (need >= 8 samples)")
        if self.neck_axis not in (0, 1, 2):
            raise ValueError(f"neck_axis={self.neck_axis} must be 0, 1 or 2 (x, y, z)")
        edges = self.band_edges()
        if len(edges) < 2:
            raise ValueError("bands_hz needs at least two edges below Nyquist")
        counts = self.band_matrix().sum(axis=0)
        if (counts == 0).any():
            empty = [
                f"{a:g}-{b:g}" for (a, b), n in zip(self._bands(), counts, strict=True) if not n
            ]
            raise ValueError(
                f"bands {empty} Hz hold no DFT bin at {self.df_hz:g} Hz resolution;"
                " use a longer window or wider bands"
            )
        object.__setattr__(self, "names", tuple(self._names()))

    @property
    def df_hz(self) -> float:
        return self.sample_rate_hz / self.window_len

    @property
    def static_len(self) -> int:
        """Odd number of samples in the running mean, at least 3."""
        k = max(3, int(round(self.static_s * self.sample_rate_hz)))
        return k if k % 2 else k + 1

    def freqs(self) -> np.ndarray:
        """Frequencies of the one-sided spectrum bins 1..T//2 (DC left out)."""
        return np.arange(1, self.window_len // 2 + 1) * self.df_hz

    def band_edges(self) -> list[float]:
        nyq = self.sample_rate_hz / 2
        edges = sorted({min(float(e), nyq) for e in self.bands_hz})
        return edges

    def _bands(self) -> list[tuple[float, float]]:
        e = self.band_edges()
        return list(zip(e[:-1], e[1:], strict=True))

    def band_matrix(self) -> np.ndarray:
        """0/1 matrix [K, B]: bin k counts in band b when lo <= f < hi (last band to Nyquist)."""
        f = self.freqs()
        bands = self._bands()
        m = np.zeros((f.size, len(bands)))
        for b, (lo, hi) in enumerate(bands):
            last = b == len(bands) - 1
            m[:, b] = (f >= lo - 1e-9) & ((f <= hi + 1e-9) if last else (f < hi - 1e-9))
        return m

    def _names(self) -> list[str]:
        names = [
            "mag_mean",
            "mag_std",
            "mag_min",
            "mag_max",
            "vedba_mean",
            "vedba_std",
            "vedba_max",
            "odba_mean",
            "neck_dyn_std",
            "radial_dyn_std",
            "static_neck_mean",
            "static_radial_mean",
            "pitch_mean",
            "pitch_std",
            "dom_freq_hz",
            "dom_power_share",
        ]
        for part in ("neck", "radial"):
            names += [f"logbp_{part}_{lo:g}-{hi:g}" for lo, hi in self._bands()]
        return names

    def to_json(self) -> dict[str, Any]:
        return {
            "sample_rate_hz": self.sample_rate_hz,
            "window_len": self.window_len,
            "static_s": self.static_s,
            "bands_hz": list(self.bands_hz),
            "neck_axis": self.neck_axis,
            "names": list(self.names),
        }


def running_mean_matrix(t: int, k: int) -> np.ndarray:
    """[T, T] matrix A with (x @ A)[j] = mean of x[i] for |i - j| <= k // 2, inside the window."""
    half = k // 2
    i = np.arange(t)
    near = np.abs(i[:, None] - i[None, :]) <= half
    return near / near.sum(axis=0, keepdims=True)


def dft_power_basis(t: int, fs: float) -> tuple[np.ndarray, np.ndarray]:
    """Cos/sin basis [T, 2K] and per-bin scale [K] so that scale * (re^2 + im^2) is the
    one-sided periodogram density (boxcar window) of bins 1..T//2, as scipy.signal.periodogram.
    """
    n = np.arange(t)[:, None]
    k = np.arange(1, t // 2 + 1)[None, :]
    ang = 2 * np.pi * n * k / t
    basis = np.concatenate([np.cos(ang), -np.sin(ang)], axis=1)
    scale = np.full(k.shape[1], 2.0 / (fs * t))
    if t % 2 == 0:
        scale[-1] = 1.0 / (fs * t)  # the Nyquist bin is not doubled
    return basis, scale


class _Graph:
    """Tiny builder over onnx.helper so the graph reads as a list of steps."""

    def __init__(self) -> None:
        from onnx import helper

        self.h = helper
        self.nodes: list[Any] = []
        self.inits: list[Any] = []
        self._n = 0

    def const(self, value: Any, dtype: Any = np.float32) -> str:
        from onnx import numpy_helper

        self._n += 1
        name = f"fc{self._n}"
        self.inits.append(numpy_helper.from_array(np.asarray(value, dtype=dtype), name))
        return name

    def op(self, op_type: str, *inputs: str, out: str | None = None, **attrs: Any) -> str:
        self._n += 1
        name = out or f"f{self._n}"
        self.nodes.append(self.h.make_node(op_type, list(inputs), [name], **attrs))
        return name

    def axes(self, *a: int) -> str:
        return self.const(list(a), np.int64)


def build_feature_graph(spec: FeatureSpec) -> Any:
    """The feature graph as an onnx.ModelProto: input ``accel`` [N, 3, T] -> ``features`` [N, F]."""
    from onnx import TensorProto, checker, helper

    t = spec.window_len
    g = _Graph()
    x = INPUT_NAME
    a = running_mean_matrix(t, spec.static_len)
    basis, scale = dft_power_basis(t, spec.sample_rate_hz)
    k = scale.size
    eye = np.eye(t)

    # Axis order: neck first, then the two radial axes, so slices below are fixed.
    others = [i for i in range(3) if i != spec.neck_axis]
    order = g.const([spec.neck_axis, *others], np.int64)
    x = g.op("Gather", x, order, axis=1)

    static = g.op("MatMul", x, g.const(a))  # [N, 3, T]
    dyn = g.op("Sub", x, static)
    # Spectrum of the dynamic part straight from the raw window: x @ ((I - A) @ basis).
    spec_ri = g.op("MatMul", x, g.const((eye - a) @ basis))  # [N, 3, 2K]
    sq = g.op("Mul", spec_ri, spec_ri)
    re2 = g.op("Slice", sq, g.axes(0), g.axes(k), g.axes(2))
    im2 = g.op("Slice", sq, g.axes(k), g.axes(2 * k), g.axes(2))
    pw = g.op("Mul", g.op("Add", re2, im2), g.const(scale))  # density [N, 3, K]
    p_neck = g.op("Slice", pw, g.axes(0), g.axes(1), g.axes(1))  # [N, 1, K]
    p_rad = g.op(
        "ReduceSum", g.op("Slice", pw, g.axes(1), g.axes(3), g.axes(1)), g.axes(1)
    )  # [N, 1, K]
    p_parts = g.op("Concat", p_neck, p_rad, axis=1)  # [N, 2, K]
    # Band power = sum of density x bin width over the band's bins.
    bands = g.op("MatMul", p_parts, g.const(spec.band_matrix() * spec.df_hz))  # [N, 2, B]
    logbp = g.op("Log", g.op("Add", bands, g.const(_EPS)))
    n_bands = spec.band_matrix().shape[1]
    logbp = g.op("Reshape", logbp, g.const([-1, 2 * n_bands], np.int64))

    p_total = g.op("ReduceSum", p_parts, g.axes(1), keepdims=0)  # [N, K]
    peak_idx = g.op("ArgMax", p_total, axis=1, keepdims=1)  # [N, 1] int64
    dom_freq = g.op(
        "Add",
        g.op("Mul", g.op("Cast", peak_idx, to=TensorProto.FLOAT), g.const(spec.df_hz)),
        g.const(spec.df_hz),  # bin index 0 is 1 x df: DC is not in the basis
    )
    peak = g.op("ReduceMax", p_total, axes=[1], keepdims=1)
    total = g.op("ReduceSum", p_total, g.axes(1), keepdims=1)
    dom_share = g.op("Div", peak, g.op("Add", total, g.const(_EPS)))

    def mean_std(v: str) -> tuple[str, str]:
        """Mean and population std over the last axis, [N, 1] each (v is [N, T])."""
        m = g.op("ReduceMean", v, axes=[-1], keepdims=1)
        ms = g.op("ReduceMean", g.op("Mul", v, v), axes=[-1], keepdims=1)
        var = g.op("Relu", g.op("Sub", ms, g.op("Mul", m, m)))
        return m, g.op("Sqrt", var)

    def squeeze_axis1(v: str) -> str:
        return g.op("Squeeze", v, g.axes(1))

    mag = g.op("Sqrt", g.op("ReduceSum", g.op("Mul", x, x), g.axes(1), keepdims=0))  # [N, T]
    mag_mean, mag_std = mean_std(mag)
    mag_min = g.op("ReduceMin", mag, axes=[-1], keepdims=1)
    mag_max = g.op("ReduceMax", mag, axes=[-1], keepdims=1)

    d2 = g.op("Mul", dyn, dyn)
    vedba = g.op("Sqrt", g.op("ReduceSum", d2, g.axes(1), keepdims=0))  # [N, T]
    vedba_mean, vedba_std = mean_std(vedba)
    vedba_max = g.op("ReduceMax", vedba, axes=[-1], keepdims=1)
    odba = g.op("ReduceSum", g.op("Abs", dyn), g.axes(1), keepdims=0)
    odba_mean = g.op("ReduceMean", odba, axes=[-1], keepdims=1)

    dyn_neck = squeeze_axis1(g.op("Slice", dyn, g.axes(0), g.axes(1), g.axes(1)))
    _, neck_std = mean_std(dyn_neck)
    dyn_rad = g.op("Slice", dyn, g.axes(1), g.axes(3), g.axes(1))  # [N, 2, T]
    rad_m = g.op("ReduceMean", dyn_rad, axes=[-1], keepdims=1)
    rad_ms = g.op("ReduceMean", g.op("Mul", dyn_rad, dyn_rad), axes=[-1], keepdims=1)
    rad_var = g.op("Relu", g.op("Sub", rad_ms, g.op("Mul", rad_m, rad_m)))
    rad_std = g.op("Sqrt", g.op("ReduceSum", rad_var, g.axes(1), keepdims=0))  # [N, 1]

    s_neck = squeeze_axis1(g.op("Slice", static, g.axes(0), g.axes(1), g.axes(1)))  # [N, T]
    s_rad2 = g.op(
        "ReduceSum",
        g.op("Mul", *(2 * [g.op("Slice", static, g.axes(1), g.axes(3), g.axes(1))])),
        g.axes(1),
        keepdims=0,
    )
    s_rad = g.op("Sqrt", s_rad2)
    s_neck_mean = g.op("ReduceMean", s_neck, axes=[-1], keepdims=1)
    s_rad_mean = g.op("ReduceMean", s_rad, axes=[-1], keepdims=1)
    # pitch = atan2(-s_neck, r) with r >= 0, which is atan(-s_neck / r) for r > 0.
    pitch = g.op("Atan", g.op("Div", g.op("Neg", s_neck), g.op("Add", s_rad, g.const(_EPS))))
    pitch_mean, pitch_std = mean_std(pitch)

    g.op(
        "Concat",
        mag_mean,
        mag_std,
        mag_min,
        mag_max,
        vedba_mean,
        vedba_std,
        vedba_max,
        odba_mean,
        neck_std,
        rad_std,
        s_neck_mean,
        s_rad_mean,
        pitch_mean,
        pitch_std,
        dom_freq,
        dom_share,
        logbp,
        axis=1,
        out=FEATURES_OUTPUT,
    )
    graph = helper.make_graph(
        g.nodes,
        "boutline_features",
        [helper.make_tensor_value_info(INPUT_NAME, TensorProto.FLOAT, ["N", 3, t])],
        [helper.make_tensor_value_info(FEATURES_OUTPUT, TensorProto.FLOAT, ["N", len(spec.names)])],
        initializer=g.inits,
    )
    model = helper.make_model(
        graph,
        opset_imports=[helper.make_opsetid("", OPSET), helper.make_opsetid("ai.onnx.ml", ML_OPSET)],
        producer_name="boutline",
    )
    model.ir_version = 8  # readable by onnxruntime >= 1.17
    checker.check_model(model)
    return model


class FeatureExtractor:
    """Runs the feature graph in onnxruntime: the same code path the gateway runs."""

    def __init__(self, spec: FeatureSpec, batch: int = 4096) -> None:
        import onnxruntime as ort

        self.spec = spec
        self.batch = batch
        opts = ort.SessionOptions()
        opts.log_severity_level = 3
        self._session = ort.InferenceSession(
            build_feature_graph(spec).SerializeToString(), opts, providers=["CPUExecutionProvider"]
        )

    def __call__(self, x: np.ndarray) -> np.ndarray:
        """Features float32 [N, F] for raw windows float32 [N, 3, T] in g."""
        if x.ndim != 3 or x.shape[1] != 3 or x.shape[2] != self.spec.window_len:
            raise ValueError(f"windows must be [N, 3, {self.spec.window_len}], got {list(x.shape)}")
        out = np.empty((x.shape[0], len(self.spec.names)), dtype=np.float32)
        for i in range(0, x.shape[0], self.batch):
            chunk = np.ascontiguousarray(x[i : i + self.batch], dtype=np.float32)
            out[i : i + len(chunk)] = self._session.run([FEATURES_OUTPUT], {INPUT_NAME: chunk})[0]
        return out
