"""Frames out of dish photos and videos, with their times after the stimulus (pure; no Django).

Photos are read with imageio (Pillow for PNG and JPEG, tifffile for TIFF); videos with PyAV, whose
wheels carry FFmpeg's decoders, so nothing else needs installing. Times are seconds after the
stimulus: `stimulus_at_s` is when the stimulus was applied, counted from the first photo or from the
start of the video; frames before it are not measured.

Photos: one every `interval_s`, in the order given. Video: one frame every `interval_s` of the
video's own clock (each the first decoded frame at or after its moment), until the end of the
video or the last wanted time.

`probe_*` read only headers, so that an upload can be refused with a clear message before
anything is stored; `read_photo` / `video_frames` give the pictures for measuring.
"""
from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from dataclasses import dataclass

import numpy as np

MAX_FRAMES = 600  # frames measured in one series: 10 min at one frame a second
MAX_FRAME_PIXELS = 40_000_000  # larger photos are refused (a 40 MP picture is already beyond a dish camera)


class FrameError(ValueError):
    """A file that cannot give the frames asked for; the message names the file and the limit."""


@dataclass(frozen=True)
class Plan:
    times_s: tuple[float, ...]  # seconds after the stimulus, one per frame to measure
    width_px: int
    height_px: int
    duration_s: float | None = None  # videos


def frame_times(count: int, *, interval_s: float, stimulus_at_s: float, until_s: float | None = None) -> list[float]:
    """Times after the stimulus of frames taken every `interval_s` from 0, dropping those before the stimulus."""
    return [t for _i, t in photo_times(count, interval_s=interval_s, stimulus_at_s=stimulus_at_s, until_s=until_s)]


def _check_interval(interval_s: float, stimulus_at_s: float) -> None:
    if not 0.04 <= interval_s <= 3600:
        raise FrameError(f"Interval: {interval_s:g} s between frames is outside 0.04-3600 s.")
    if not 0 <= stimulus_at_s <= 86400:
        raise FrameError(f"Stimulus at: {stimulus_at_s:g} s is outside 0-86400 s.")


def _check_count(times: Sequence[float], what: str) -> None:
    if not times:
        raise FrameError(f"{what}: no frame falls after the stimulus; check 'stimulus at' and the interval.")
    if len(times) > MAX_FRAMES:
        raise FrameError(f"{what}: {len(times)} frames to measure is more than the limit of {MAX_FRAMES}; "
                         "take a longer interval between frames.")


def _photo_size(handle) -> tuple[int, int]:
    from PIL import Image

    handle.seek(0)
    try:
        with Image.open(handle) as picture:
            width, height = picture.size
    except Exception as error:  # Pillow raises many kinds for a damaged file
        raise FrameError(f"could not be read as a picture ({error.__class__.__name__}).") from None
    finally:
        handle.seek(0)
    return width, height


def probe_photos(files: Sequence, names: Sequence[str], *, interval_s: float, stimulus_at_s: float,
                 until_s: float | None = None) -> Plan:
    """Check photos (readable, one size, not too large) and plan their times; files are open binary handles."""
    _check_interval(interval_s, stimulus_at_s)
    if len(files) > MAX_FRAMES:
        raise FrameError(f"Photos: {len(files)} photos is more than the limit of {MAX_FRAMES}.")
    size = None
    for handle, name in zip(files, names):
        try:
            width, height = _photo_size(handle)
        except FrameError as error:
            raise FrameError(f"Photo '{name}' {error}") from None
        if width * height > MAX_FRAME_PIXELS:
            raise FrameError(f"Photo '{name}' has {width}×{height} px, more than the limit of "
                             f"{MAX_FRAME_PIXELS / 1e6:g} million pixels.")
        if size is not None and (width, height) != size:
            raise FrameError(f"Photo '{name}' is {width}×{height} px but the first is {size[0]}×{size[1]} px; "
                             "a series is taken with one camera setting.")
        size = (width, height)
    times = frame_times(len(files), interval_s=interval_s, stimulus_at_s=stimulus_at_s, until_s=until_s)
    _check_count(times, "Photos")
    return Plan(times_s=tuple(times), width_px=size[0], height_px=size[1])


def photo_times(count: int, *, interval_s: float, stimulus_at_s: float,
                until_s: float | None = None) -> list[tuple[int, float]]:
    """(index of the photo, time after the stimulus) of the photos to measure."""
    pairs = []
    for i in range(count):
        t = i * interval_s - stimulus_at_s
        if until_s is not None and t > until_s + 1e-9:
            break
        if t >= -1e-9:
            pairs.append((i, round(max(t, 0.0), 6)))
    return pairs


def read_photo(handle) -> np.ndarray:
    """One photo as an array (its first page when the file holds several)."""
    import imageio.v3 as iio

    handle.seek(0)
    try:
        image = iio.imread(handle.read())
    except Exception as error:  # the reading plugins raise many kinds for a damaged file
        raise FrameError(f"could not be read as a picture ({error.__class__.__name__}).") from None
    if image.ndim == 3 and image.shape[-1] not in (1, 3, 4):
        image = image[0]
    elif image.ndim == 4:
        image = image[0]
    return image


def _open_video(handle):
    import av

    handle.seek(0)
    try:
        container = av.open(handle, mode="r")
    except Exception as error:  # PyAV raises FFmpeg's errors under several classes
        raise FrameError(f"could not be opened as a video ({error.__class__.__name__}).") from None
    if not container.streams.video:
        container.close()
        raise FrameError("holds no video stream.")
    return container


def probe_video(handle, name: str, *, interval_s: float, stimulus_at_s: float,
                until_s: float | None = None) -> Plan:
    _check_interval(interval_s, stimulus_at_s)
    try:
        container = _open_video(handle)
    except FrameError as error:
        raise FrameError(f"Video '{name}' {error}") from None
    try:
        stream = container.streams.video[0]
        width, height = stream.codec_context.width, stream.codec_context.height
        if stream.duration is not None and stream.time_base is not None:
            duration = float(stream.duration * stream.time_base)
        elif container.duration is not None:
            duration = container.duration / 1_000_000  # FFmpeg's AV_TIME_BASE is microseconds
        else:
            duration = None
    finally:
        container.close()
        handle.seek(0)
    if not width or not height:
        raise FrameError(f"Video '{name}' does not say its frame size; it may be damaged.")
    if width * height > MAX_FRAME_PIXELS:
        raise FrameError(f"Video '{name}' has {width}×{height} px frames, more than the limit of "
                         f"{MAX_FRAME_PIXELS / 1e6:g} million pixels.")
    if duration is None or not math.isfinite(duration) or duration <= 0:
        raise FrameError(f"Video '{name}' does not say how long it is; it may be damaged.")
    count = max(1, math.ceil(duration / interval_s - 1e-9))  # frames at i × interval before the end
    times = frame_times(count, interval_s=interval_s, stimulus_at_s=stimulus_at_s, until_s=until_s)
    _check_count(times, f"Video '{name}'")
    return Plan(times_s=tuple(times), width_px=width, height_px=height, duration_s=duration)


def video_frames(handle, plan: Plan, *, stimulus_at_s: float) -> Iterator[tuple[float, np.ndarray]]:
    """(time after the stimulus, grey frame) for each planned time the video reaches.

    The time given is the planned one; the frame is the first decoded at or after it (its own
    timestamp is at most one frame period later).
    """
    container = _open_video(handle)
    try:
        stream = container.streams.video[0]
        stream.thread_type = "AUTO"
        wanted = list(plan.times_s)
        i = 0
        for frame in container.decode(stream):
            if i >= len(wanted):
                break
            if frame.time is None:
                continue
            clock = float(frame.time) - stimulus_at_s
            if clock + 1e-6 >= wanted[i]:
                image = frame.to_ndarray(format="gray")
                while i < len(wanted) and clock + 1e-6 >= wanted[i]:
                    yield wanted[i], image
                    i += 1
    finally:
        container.close()
