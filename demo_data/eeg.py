"""Synthetic 32-channel EEG for the demo study, and the score derived from it.

Signal model (all in microvolts), built in one vectorised pass per session:
- background: pink-ish noise (power flat up to 4 Hz, 1/f above), 10-16 uV RMS per
  channel, partly shared across channels, band-limited to 0.5-70 Hz;
- alpha: two narrow-band ~10 Hz sources, strongest over occipital sites;
- per trial: an early visual response (occipital, preference-independent) and a
  late parietal positivity peaking ~450 ms after the photo, whose amplitude grows
  with the participant's latent preference for the dish (a few uV). A P3-like
  component at 300-600 ms over parietal sites is common practice in ERP
  research, no source;
- blinks: large positive deflections at Fp1/Fp2, fading towards the back.

The derived preference score is computed from the recording itself (the values
as decoded from the EDF+ file): baseline-corrected mean amplitude 300-600 ms over
parietal sites, blink-contaminated epochs dropped, averaged over repetitions,
z-scored within the participant and squashed by the logistic function into the
open interval (0, 1).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

SAMPLING_RATE = 256  # Hz
# 32 labels of the 10-20 system and its 10-10 extension (FCz, CPz).
CHANNELS: tuple[str, ...] = (
    "Fp1", "Fp2", "F7", "F3", "Fz", "F4", "F8", "FC5", "FC1", "FCz", "FC2", "FC6",
    "T7", "C3", "Cz", "C4", "T8", "CP5", "CP1", "CPz", "CP2", "CP6",
    "P7", "P3", "Pz", "P4", "P8", "PO3", "PO4", "O1", "Oz", "O2",
)  # fmt: skip
PHYSICAL_RANGE_UV = (-800.0, 800.0)

EPOCH_S = (-0.2, 0.8)
BASELINE_S = (-0.2, 0.0)
WINDOW_S = (0.3, 0.6)
SCORE_SITES: tuple[str, ...] = ("Pz", "CPz", "P3", "P4", "CP1", "CP2")
BLINK_SITES: tuple[str, ...] = ("Fp1", "Fp2")
BLINK_REJECT_UV = 120.0  # peak-to-peak within an epoch at Fp1/Fp2
SCORE_RANGE = (0.0, 1.0)

LEAD_IN_S = 4.0
BLOCK_BREAK_S = 6.0
TAIL_S = 3.0
STIMULUS_S = 1.0  # photo on screen
SOA_S = (1.4, 1.7)  # onset to onset, uniform
PINK_KNEE_HZ = 4.0  # background power falls as 1/f above this, flat below (down to 0.5 Hz)
SHARED_NOISE = 0.10  # share of background variance common to all channels

_P3_WEIGHTS = {
    "Pz": 1.0, "CPz": 0.95, "CP1": 0.85, "CP2": 0.85, "P3": 0.8, "P4": 0.8,
    "PO3": 0.65, "PO4": 0.65, "Cz": 0.6, "CP5": 0.55, "CP6": 0.55, "C3": 0.5,
    "C4": 0.5, "P7": 0.45, "P8": 0.45, "Oz": 0.4, "O1": 0.35, "O2": 0.35,
    "FCz": 0.3, "FC1": 0.3, "FC2": 0.3, "Fz": 0.2, "F3": 0.15, "F4": 0.15,
}  # fmt: skip
_BLINK_WEIGHTS = {
    "frontopolar": 1.0, "frontal": 0.4, "frontocentral": 0.15, "temporal": 0.08,
    "central": 0.06, "centroparietal": 0.03, "parietal": 0.015,
    "parieto-occipital": 0.01, "occipital": 0.01,
}  # fmt: skip
_ALPHA_WEIGHTS = {
    "frontopolar": 0.05, "frontal": 0.1, "frontocentral": 0.15, "temporal": 0.2,
    "central": 0.25, "centroparietal": 0.45, "parietal": 0.7,
    "parieto-occipital": 0.9, "occipital": 1.0,
}  # fmt: skip
_VISUAL_WEIGHTS = {"occipital": 1.0, "parieto-occipital": 0.8, "parietal": 0.3}


def region(label: str) -> str:
    """Scalp region of a 10-20 label, from its letter prefix."""
    for prefix, name in (
        ("Fp", "frontopolar"), ("FC", "frontocentral"), ("F", "frontal"),
        ("T", "temporal"), ("CP", "centroparietal"), ("C", "central"),
        ("PO", "parieto-occipital"), ("P", "parietal"), ("O", "occipital"),
    ):  # fmt: skip
        if label.startswith(prefix):
            return name
    raise ValueError(f"unknown 10-20 region for label {label!r}")


def _hemisphere_mix(label: str) -> tuple[float, float]:
    """(left, right) share: odd digits are left, even right, 'z' midline."""
    if label.endswith("z"):
        return 0.5, 0.5
    return (0.8, 0.2) if int(label[-1]) % 2 else (0.2, 0.8)


def _column(
    weights: dict[str, float], default: float = 0.0, by_region: bool = False
) -> np.ndarray:
    keys = [region(c) if by_region else c for c in CHANNELS]
    return np.array([weights.get(k, default) for k in keys])[:, None]


@dataclass(frozen=True)
class EegParams:
    """Per-participant physiology, drawn once per session."""

    noise_uv: float
    alpha_hz: float
    alpha_uv: float
    p3_base_uv: float
    p3_gain_uv: float  # extra amplitude per rating point of latent preference
    p3_jitter_uv: float
    p3_latency_s: float
    blink_interval_s: float

    @classmethod
    def draw(cls, rng: np.random.Generator) -> EegParams:
        return cls(
            noise_uv=float(rng.uniform(10.0, 16.0)),
            alpha_hz=float(rng.uniform(9.0, 11.0)),
            alpha_uv=float(rng.uniform(5.0, 9.0)),
            p3_base_uv=float(rng.uniform(4.0, 5.0)),
            p3_gain_uv=float(rng.uniform(2.0, 2.8)),
            p3_jitter_uv=float(rng.uniform(0.6, 1.0)),
            p3_latency_s=float(rng.uniform(0.42, 0.48)),
            blink_interval_s=float(rng.uniform(4.0, 8.0)),
        )


@dataclass(frozen=True)
class Session:
    data_uv: np.ndarray  # (channels, samples)
    onsets: np.ndarray  # (trials,) sample index of each photo onset
    items: np.ndarray  # (trials,) dish index shown
    blocks: tuple[tuple[int, int], ...]  # (first, last) sample of each block's trials

    @property
    def duration_s(self) -> float:
        return self.data_uv.shape[1] / SAMPLING_RATE


def trial_order(rng: np.random.Generator, n_items: int, repetitions: int) -> np.ndarray:
    """Each block shows every dish once, in its own random order."""
    return np.concatenate([rng.permutation(n_items) for _ in range(repetitions)])


def _timeline(
    rng: np.random.Generator, n_trials: int, repetitions: int
) -> tuple[np.ndarray, int, tuple[tuple[int, int], ...]]:
    fs = SAMPLING_RATE
    soa = np.rint(rng.uniform(*SOA_S, size=n_trials) * fs).astype(np.int64)
    per_block = n_trials // repetitions
    gaps = soa.copy()
    gaps[0] = round(LEAD_IN_S * fs)
    gaps[per_block::per_block] += round(BLOCK_BREAK_S * fs)
    onsets = np.cumsum(gaps)
    last = int(onsets[-1]) + round((SOA_S[1] + TAIL_S) * fs)
    n_samples = -(-last // fs) * fs  # whole 1-s data records
    blocks = tuple(
        (int(onsets[b * per_block]), int(onsets[(b + 1) * per_block - 1]))
        for b in range(repetitions)
    )
    return onsets, n_samples, blocks


def _coloured_noise(rng: np.random.Generator, n_samples: int, alpha_hz: float) -> np.ndarray:
    """Rows 0..31 pink per channel, row 32 shared pink, rows 33-34 alpha; unit RMS."""
    freqs = np.fft.rfftfreq(n_samples, 1 / SAMPLING_RATE)
    band = (freqs >= 0.5) / (1 + (freqs / 70.0) ** 8)
    pink = band / np.sqrt(np.maximum(freqs, PINK_KNEE_HZ))
    alpha = np.exp(-0.5 * ((freqs - alpha_hz) / 0.7) ** 2)
    n_pink = len(CHANNELS) + 1
    spectra = rng.standard_normal((n_pink + 2, 2 * freqs.size)).view(np.complex128)
    spectra[:n_pink] *= pink
    spectra[n_pink:] *= alpha
    rows = np.fft.irfft(spectra, n=n_samples, axis=1)
    return rows / rows.std(axis=1, keepdims=True)


def _add_at(course: np.ndarray, start: int, wave: np.ndarray) -> None:
    end = min(start + wave.size, course.size)
    course[start:end] += wave[: end - start]


def simulate(
    rng: np.random.Generator,
    params: EegParams,
    items: np.ndarray,
    preference: np.ndarray,
    repetitions: int,
) -> Session:
    """One session: `items[k]` shown at trial k, with latent `preference[k]` (0..3)."""
    fs = SAMPLING_RATE
    n_ch = len(CHANNELS)
    onsets, n_samples, blocks = _timeline(rng, len(items), repetitions)
    rows = _coloured_noise(rng, n_samples, params.alpha_hz)
    channel_noise = params.noise_uv * rng.uniform(0.85, 1.15, size=(n_ch, 1))
    data = rows[:n_ch]
    data *= channel_noise * np.sqrt(1 - SHARED_NOISE)

    # Every other part is one time course spread over the scalp by fixed weights.
    envelope = 0.6 + 0.4 * np.sin(
        2 * np.pi * rng.uniform(0.02, 0.05) * np.arange(n_samples) / fs + rng.uniform(0, 6.3)
    )
    t = np.arange(round(EPOCH_S[1] * fs)) / fs
    visual = 4.0 * np.exp(-0.5 * ((t - 0.10) / 0.02) ** 2) - 5.0 * np.exp(
        -0.5 * ((t - 0.17) / 0.025) ** 2
    )
    late = np.zeros(n_samples)
    early = np.zeros(n_samples)
    amplitudes = (
        params.p3_base_uv
        + params.p3_gain_uv * (np.clip(preference, -0.5, 3.5) - 1.5)
        + rng.normal(0.0, params.p3_jitter_uv, size=len(items))
    )
    latencies = params.p3_latency_s + rng.normal(0.0, 0.025, size=len(items))
    for onset, amp, lat in zip(onsets, amplitudes, latencies, strict=True):
        _add_at(late, int(onset), amp * np.exp(-0.5 * ((t - lat) / 0.085) ** 2))
        _add_at(early, int(onset), visual)
    blinks = np.zeros(n_samples)
    blink_t = np.arange(round(0.35 * fs)) / fs
    blink_shape = np.sin(np.pi * blink_t / 0.35) ** 2
    at = rng.exponential(params.blink_interval_s)
    while at < n_samples / fs - 0.5:
        _add_at(blinks, round(at * fs), rng.uniform(80.0, 200.0) * blink_shape)
        at += 0.4 + rng.exponential(params.blink_interval_s)

    hemi = np.array([_hemisphere_mix(c) for c in CHANNELS])
    alpha = params.alpha_uv * _column(_ALPHA_WEIGHTS, by_region=True)
    parts = (
        (channel_noise * np.sqrt(SHARED_NOISE), rows[n_ch]),
        (alpha * hemi[:, :1], rows[n_ch + 1] * envelope),
        (alpha * hemi[:, 1:], rows[n_ch + 2] * envelope),
        (_column(_P3_WEIGHTS, default=0.1), late),
        (_column(_VISUAL_WEIGHTS, default=0.05, by_region=True), early),
        (_column(_BLINK_WEIGHTS, by_region=True), blinks),
    )
    # Elementwise, not matrix products: no BLAS, so bytes do not depend on its threads.
    for weights, course in parts:
        data += weights * course

    np.clip(data, *PHYSICAL_RANGE_UV, out=data)
    return Session(data_uv=data, onsets=onsets, items=np.asarray(items), blocks=blocks)


def _samples(window: tuple[float, float]) -> slice:
    return slice(round(window[0] * SAMPLING_RATE), round(window[1] * SAMPLING_RATE))


def epochs(data_uv: np.ndarray, onsets: np.ndarray) -> np.ndarray:
    """(trials, channels, epoch samples) from EPOCH_S around each onset."""
    start = round(EPOCH_S[0] * SAMPLING_RATE)
    length = round((EPOCH_S[1] - EPOCH_S[0]) * SAMPLING_RATE)
    index = onsets[:, None] + start + np.arange(length)[None, :]
    return np.transpose(data_uv[:, index], (1, 0, 2))


def late_window_amplitude(data_uv: np.ndarray, onsets: np.ndarray) -> np.ndarray:
    """Per trial: mean over SCORE_SITES of (mean 300-600 ms) - (mean -200-0 ms)."""
    sites = [CHANNELS.index(c) for c in SCORE_SITES]
    ep = epochs(data_uv[sites], onsets)
    offset = -round(EPOCH_S[0] * SAMPLING_RATE)
    base = _samples(BASELINE_S)
    win = _samples(WINDOW_S)
    baseline = ep[:, :, base.start + offset : base.stop + offset].mean(axis=2)
    window = ep[:, :, win.start + offset : win.stop + offset].mean(axis=2)
    return (window - baseline).mean(axis=1)


def blink_contaminated(data_uv: np.ndarray, onsets: np.ndarray) -> np.ndarray:
    """Per trial: True when Fp1/Fp2 swing more than BLINK_REJECT_UV in the epoch."""
    sites = [CHANNELS.index(c) for c in BLINK_SITES]
    ep = epochs(data_uv[sites], onsets)
    return (ep.max(axis=2) - ep.min(axis=2)).max(axis=1) > BLINK_REJECT_UV


def derive_scores(
    data_uv: np.ndarray, onsets: np.ndarray, items: np.ndarray, n_items: int
) -> np.ndarray:
    """Per dish score in (0, 1): logistic of the within-participant z-score."""
    amplitude = late_window_amplitude(data_uv, onsets)
    clean = ~blink_contaminated(data_uv, onsets)
    per_item = np.empty(n_items)
    for item in range(n_items):
        shown = items == item
        keep = shown & clean
        per_item[item] = amplitude[keep if keep.any() else shown].mean()
    z = (per_item - per_item.mean()) / per_item.std()
    return 1.0 / (1.0 + np.exp(-z))
