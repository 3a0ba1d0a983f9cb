"""Clump and dispersal measured from dish images (pure: arrays in, numbers out; no Django).

One frame (`measure_frame`)
    1. Grey levels on 0-1 (colour by the ITU-R BT.709 luma weights of skimage.color.rgb2gray).
    2. Turned so that worms are bright ("signal"): worms are dark on a light dish unless
       polarity is "bright".
    3. Light smoothing (Gaussian, `smoothing_px`) against pixel noise.
    4. Background flattening for uneven lighting: the dish's own brightness is estimated by a wide
       Gaussian blur (`background_px`) of the pixels that are not worms (a first pass finds the
       worms; normalised convolution fills the background in under them, so a large clump does not
       lift the background around itself). Without flattening the background is one level, the
       median of the frame (the dish must then be mostly background).
    5. Contrast: for dark worms, the share of the local dish brightness a pixel lacks (a flat-field
       correction: 1 - grey / dish); for bright worms on a dark field, grey - dish.
       Worm pixels: the contrast passes Otsu's threshold (Otsu 1979, IEEE Trans. SMC 9:62-66, as
       skimage.filters.threshold_otsu), or a stated `threshold`, and never less than
       `min_contrast`, so an empty or noisy dish does not turn its noise into worms.
    6. Optional dish mask: only a centred circle of `dish_radius_fraction` × half the shorter side
       counts (the dark rim of a Petri dish is not a worm).
    7. Connected components (8-connected by default, skimage.measure.label); components smaller
       than `min_area_px` are dropped as specks. Touching worms are one component: a clump is one
       cluster, which is the point of the measure.
    largest_cluster_fraction = area of the largest component / area of all components.

Frames larger than `max_side_px` are scaled down first (anti-aliased) for speed; every setting
and every area is stated in the frame's own pixels, whatever the working scale.

A series (`measure_series`)
    dispersal_time_s: the time of the first frame from which the largest-cluster fraction stays
    below `threshold` in every later frame within the window (frames with no worm at all say
    nothing and are skipped). The true moment lies between that frame and the one before, so the
    frame interval bounds the resolution. censored: no such frame within the window (still clumped
    at the last frame at or before the window's end).
"""
from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Sequence
from dataclasses import asdict, dataclass, field

import numpy as np
from scipy import ndimage
from skimage import color, filters, measure, transform, util

POLARITIES = ("dark", "bright")
DEFAULT_THRESHOLD = 0.5  # a lab convention (the largest clump holds under half the worm area), not a published value
MIN_SIDE_PX = 16
MAX_AREAS_KEPT = 50  # the largest cluster areas kept per frame; the count covers all of them


@dataclass(frozen=True)
class Segmentation:
    """How worms are told from the dish; every value is stored with the measurement."""

    polarity: str = "dark"
    smoothing_px: float = 1.0
    background_px: float | None = 40.0
    threshold: float | None = None
    min_contrast: float = 0.06
    min_area_px: int = 12
    dish_radius_fraction: float | None = None
    connectivity: int = 2
    max_side_px: int = 1024

    def __post_init__(self):
        problems = []
        if self.polarity not in POLARITIES:
            problems.append(f"polarity {self.polarity!r} is not one of {', '.join(POLARITIES)}")
        if not 0 <= self.smoothing_px <= 20:
            problems.append(f"smoothing {self.smoothing_px:g} px is outside 0-20 px")
        if self.background_px is not None and not 2 <= self.background_px <= 2000:
            problems.append(f"background scale {self.background_px:g} px is outside 2-2000 px")
        if self.threshold is not None and not 0 < self.threshold < 1:
            problems.append(f"contrast threshold {self.threshold:g} is outside 0-1 (exclusive)")
        if not 0 <= self.min_contrast < 1:
            problems.append(f"minimum contrast {self.min_contrast:g} is outside 0-1")
        if not 1 <= self.min_area_px <= 1_000_000:
            problems.append(f"minimum area {self.min_area_px} px is outside 1-1000000 px")
        if self.dish_radius_fraction is not None and not 0.1 <= self.dish_radius_fraction <= 1.5:
            problems.append(f"dish radius {self.dish_radius_fraction:g} is outside 0.1-1.5 of half the shorter side")
        if self.connectivity not in (1, 2):
            problems.append(f"connectivity {self.connectivity} is not 1 (4-neighbours) or 2 (8-neighbours)")
        if not 64 <= self.max_side_px <= 8192:
            problems.append(f"working size {self.max_side_px} px is outside 64-8192 px")
        if problems:
            raise ValueError("Segmentation: " + "; ".join(problems) + ".")

    def as_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class FrameMetrics:
    cluster_count: int
    largest_cluster_fraction: float | None  # None: no worm in the frame
    worm_area_px: int
    largest_cluster_area_px: int
    cluster_areas_px: tuple[int, ...]  # largest first, at most MAX_AREAS_KEPT
    contrast_threshold: float  # the threshold applied to the flattened contrast (0-1)
    height_px: int
    width_px: int
    working_scale: float  # 1.0, or the factor the frame was scaled down by for measuring
    scale_px_per_mm: float | None
    settings: dict = field(default_factory=dict)

    @property
    def worm_area_mm2(self) -> float | None:
        return self.worm_area_px / self.scale_px_per_mm ** 2 if self.scale_px_per_mm else None

    @property
    def largest_cluster_area_mm2(self) -> float | None:
        return self.largest_cluster_area_px / self.scale_px_per_mm ** 2 if self.scale_px_per_mm else None

    def as_row(self) -> dict:
        """The numbers stored per frame (the settings are stored once per series)."""
        return {"clusters": self.cluster_count, "largest_fraction": self.largest_cluster_fraction,
                "worm_area_px": self.worm_area_px, "largest_area_px": self.largest_cluster_area_px,
                "worm_area_mm2": self.worm_area_mm2, "contrast_threshold": round(self.contrast_threshold, 5),
                "areas_px": list(self.cluster_areas_px[:10])}


@dataclass(frozen=True)
class SeriesMetrics:
    frames: tuple[FrameMetrics, ...]
    times_s: tuple[float, ...]
    threshold: float
    window_s: float
    dispersal_time_s: float | None
    censored: bool
    observed_until_s: float | None  # the last frame at or before the window's end
    settings: dict

    @property
    def covers_window(self) -> bool:
        return self.observed_until_s is not None and self.observed_until_s >= self.window_s

    def frame_at(self, t_s: float) -> FrameMetrics | None:
        for t, frame in zip(self.times_s, self.frames):
            if t == t_s:
                return frame
        return None

    def rows(self) -> list[dict]:
        return [{"t_s": t, **f.as_row()} for t, f in zip(self.times_s, self.frames)]


def to_grey(image) -> np.ndarray:
    """A 2-D float array on 0-1 from a grey, RGB or RGBA image: integers scaled by their type's maximum,
    floats taken as 0-1 (values outside are clipped)."""
    array = np.asarray(image)
    if array.ndim == 3 and array.shape[-1] in (3, 4):
        array = color.rgb2gray(array[..., :3])
    elif array.ndim == 3 and array.shape[-1] == 1:
        array = array[..., 0]
    if array.ndim != 2:
        raise ValueError(f"Image: expected a grey or colour picture, got an array of shape {array.shape}.")
    if min(array.shape) < MIN_SIDE_PX:
        raise ValueError(f"Image: {array.shape[1]}×{array.shape[0]} px is too small; at least "
                         f"{MIN_SIDE_PX} px on each side.")
    if array.dtype == bool:
        return array.astype(float)
    if array.dtype.kind in "ui":
        return util.img_as_float(array)  # integers: 0 to the type's maximum
    grey = np.asarray(array, dtype=float)
    if not np.isfinite(grey).all():
        raise ValueError("Image: it contains values that are not numbers (NaN or infinite).")
    return np.clip(grey, 0.0, 1.0)  # floats are grey levels on 0-1 already; stretching would amplify noise


def dish_mask(shape: tuple[int, int], radius_fraction: float | None) -> np.ndarray:
    """True inside a circle centred in the frame, radius = fraction × half the shorter side."""
    if radius_fraction is None:
        return np.ones(shape, dtype=bool)
    rows, cols = np.ogrid[:shape[0], :shape[1]]
    cy, cx = (shape[0] - 1) / 2, (shape[1] - 1) / 2
    radius = radius_fraction * min(shape) / 2
    return (rows - cy) ** 2 + (cols - cx) ** 2 <= radius ** 2


def _otsu(values: np.ndarray) -> float:
    if values.size == 0 or float(values.max()) <= float(values.min()):
        return math.inf
    return float(filters.threshold_otsu(values))


def _background(signal: np.ndarray, inside: np.ndarray, s: Segmentation, sigma: float | None,
                min_contrast: float) -> np.ndarray:
    if sigma is None:
        return np.full_like(signal, float(np.median(signal[inside])))
    first = signal - ndimage.gaussian_filter(signal, sigma, mode="nearest")
    cut = max(_otsu(first[inside]), min_contrast)
    worms = first > cut if math.isfinite(cut) else np.zeros_like(signal, dtype=bool)
    # Grow the first-pass worms a little so their blurred edges do not count as background.
    worms = ndimage.binary_dilation(worms, iterations=max(1, int(round(sigma / 8))))
    weight = (inside & ~worms).astype(float)
    if weight.sum() < 0.05 * signal.size:  # almost no background seen: fall back to one level
        return np.full_like(signal, float(np.median(signal[inside])))
    num = ndimage.gaussian_filter(signal * weight, sigma, mode="nearest")
    den = ndimage.gaussian_filter(weight, sigma, mode="nearest")
    level = float(np.median(signal[weight > 0]))
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 1e-3, num / np.maximum(den, 1e-12), level)


def measure_frame(image, *, scale_px_per_mm: float | None = None,
                  settings: Segmentation | None = None) -> FrameMetrics:
    """Clusters of worms in one dish image (see the module docstring for the method)."""
    s = settings or Segmentation()
    if scale_px_per_mm is not None and not 0 < scale_px_per_mm <= 10_000:
        raise ValueError(f"Scale: {scale_px_per_mm:g} px/mm is outside 0-10000 px/mm (exclusive of 0).")
    grey = to_grey(image)
    height, width = grey.shape
    factor = min(1.0, s.max_side_px / max(height, width))
    if factor < 1.0:
        grey = transform.rescale(grey, factor, anti_aliasing=True, preserve_range=True)
    signal = 1.0 - grey if s.polarity == "dark" else grey
    if s.smoothing_px > 0:
        signal = ndimage.gaussian_filter(signal, s.smoothing_px * factor, mode="nearest")
    inside = dish_mask(signal.shape, s.dish_radius_fraction)
    sigma = s.background_px * factor if s.background_px is not None else None
    background = _background(signal, inside, s, sigma, s.min_contrast)
    contrast = signal - background
    if s.polarity == "dark":
        # Flat-field: light on the dish is multiplicative, so a worm darkens its spot by a share of
        # the local dish brightness (1 - background of the signal); dividing by it evens out the contrast
        # between the bright and the dim side. A dark field (bright worms) has a background near
        # zero, where a ratio would only amplify noise: there the difference is used.
        contrast = contrast / np.maximum(1.0 - background, 0.05)
    cut = s.threshold if s.threshold is not None else _otsu(contrast[inside])
    cut = max(cut, s.min_contrast)
    worms = (contrast > cut) & inside
    labels = measure.label(worms, connectivity=s.connectivity)
    areas = np.bincount(labels.ravel())[1:] / factor ** 2  # in the frame's own pixels
    areas = np.sort(areas[areas >= s.min_area_px])[::-1]
    total = float(areas.sum())
    largest = float(areas[0]) if areas.size else 0.0
    return FrameMetrics(
        cluster_count=int(areas.size), largest_cluster_fraction=largest / total if total > 0 else None,
        worm_area_px=int(round(total)), largest_cluster_area_px=int(round(largest)),
        cluster_areas_px=tuple(int(round(a)) for a in areas[:MAX_AREAS_KEPT]),
        contrast_threshold=float(cut) if math.isfinite(cut) else 1.0, height_px=height, width_px=width,
        working_scale=factor, scale_px_per_mm=scale_px_per_mm, settings=s.as_dict())


def dispersal(times_s: Sequence[float], fractions: Sequence[float | None], *, threshold: float,
              window_s: float) -> tuple[float | None, bool, float | None]:
    """(dispersal time, censored, last frame time within the window) by the rule in the module docstring."""
    seen = [(t, f) for t, f in zip(times_s, fractions) if t <= window_s and f is not None]
    observed_until = max((t for t in times_s if t <= window_s), default=None)
    start = None
    for t, f in seen:
        if f < threshold:
            if start is None:
                start = t
        else:
            start = None
    return start, start is None, observed_until


def _check_times(times: Sequence[float]) -> None:
    for i, t in enumerate(times):
        if not math.isfinite(t) or t < 0:
            raise ValueError(f"Times: frame {i + 1} is at {t!r} s; times are seconds after the stimulus, 0 or more.")
        if i and t <= times[i - 1]:
            raise ValueError(f"Times: frame {i + 1} ({t:g} s) is not after frame {i} ({times[i - 1]:g} s); "
                             "times must increase.")


def _check_series(threshold: float, window_s: float) -> None:
    if not 0 < threshold < 1:
        raise ValueError(f"Threshold: a largest-cluster fraction of {threshold:g} is outside 0-1 (exclusive).")
    if not 0 < window_s <= 86400:
        raise ValueError(f"Window: {window_s:g} s is outside 1-86400 s.")


def measure_series(frames: Iterable, times_s: Sequence[float], *, threshold: float = DEFAULT_THRESHOLD,
                   window_s: float, scale_px_per_mm: float | None = None, settings: Segmentation | None = None,
                   progress: Callable[[int], None] | None = None) -> SeriesMetrics:
    """Measure every frame (in order, at `times_s` seconds after the stimulus) and find the dispersal."""
    _check_series(threshold, window_s)
    times = [float(t) for t in times_s]
    _check_times(times)
    s = settings or Segmentation()
    measured = []
    for i, image in enumerate(frames):
        if i >= len(times):
            raise ValueError(f"Frames: more frames than times ({len(times)}).")
        measured.append(measure_frame(image, scale_px_per_mm=scale_px_per_mm, settings=s))
        if progress is not None:
            progress(i + 1)
    if len(measured) != len(times):
        raise ValueError(f"Frames: {len(measured)} frames for {len(times)} times.")
    return summarise(measured, times, threshold=threshold, window_s=window_s, settings=s,
                     scale_px_per_mm=scale_px_per_mm)


def summarise(measured: Sequence[FrameMetrics], times_s: Sequence[float], *, threshold: float, window_s: float,
              settings: Segmentation, scale_px_per_mm: float | None = None) -> SeriesMetrics:
    """The series from frames already measured (e.g. one at a time while a video is decoded)."""
    _check_series(threshold, window_s)
    times = [float(t) for t in times_s]
    _check_times(times)
    if len(measured) != len(times):
        raise ValueError(f"Frames: {len(measured)} frames for {len(times)} times.")
    if not measured:
        raise ValueError("Frames: no frame to measure.")
    t_disp, censored, until = dispersal(times, [f.largest_cluster_fraction for f in measured],
                                        threshold=threshold, window_s=window_s)
    return SeriesMetrics(frames=tuple(measured), times_s=tuple(times), threshold=threshold, window_s=window_s,
                         dispersal_time_s=t_disp, censored=censored, observed_until_s=until,
                         settings={**settings.as_dict(), "threshold": threshold, "window_s": window_s,
                                   "scale_px_per_mm": scale_px_per_mm})


def proposed_clusters(rows: Sequence[dict], *, dispersal_time_s: float | None, window_s: float,
                      points: int = 12) -> list[dict]:
    """At most `points` (+1) of the stored frame rows ({"t_s", "clusters", "largest_fraction", ...}) for the
    trial's cluster table: evenly spread over the frames within the window, the last one and the dispersal
    frame always among them; frames with no worm are left out."""
    kept = [r for r in rows if r["t_s"] <= window_s and r["largest_fraction"] is not None]
    if not kept:
        return []
    picks = {round(i * (len(kept) - 1) / (points - 1)) for i in range(points)} if len(kept) > points \
        else set(range(len(kept)))
    picks |= {i for i, r in enumerate(kept) if r["t_s"] == dispersal_time_s}
    return [{"t_s": kept[i]["t_s"], "clusters": kept[i]["clusters"],
             "largest_fraction": round(kept[i]["largest_fraction"], 3)} for i in sorted(picks)]


__all__ = ["DEFAULT_THRESHOLD", "FrameMetrics", "Segmentation", "SeriesMetrics", "dish_mask", "dispersal",
           "measure_frame", "measure_series", "proposed_clusters", "summarise", "to_grey"]
