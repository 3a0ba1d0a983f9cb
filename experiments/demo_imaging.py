"""Invented dish photo series for some demo trials, measured as the trial page would, so that the study page
shows how image measurement and the human scores agree.

Each series is 13 grey PNG frames of 160 × 160 px, one every 50 s from the stimulus to the end of the
600 s window: a light dish, unevenly lit (brighter on one side, darker towards the rim), with its dark
rim in view and a little sensor noise; ten worms, drawn as short dark bars, lie in one clump and
move apart from a moment near (not at) the time the human scorer recorded, so the two disagree a
little, as they do at the bench. A trial scored "still clumped" mostly stays clumped; one loosens
just before the end of the window, which the images may call dispersed. Deterministic for a seed.
"""
from __future__ import annotations

import math
import random

import imageio.v3 as iio
import numpy as np
from django.core.files.uploadedfile import SimpleUploadedFile
from skimage import draw

from . import imaging, measuring
from .models import ImageMeasurement

SIZE = 160
FRAMES = 13
INTERVAL_S = 50.0
WORMS = 10
SERIES = 8  # trials of the study given a photo series
SETTINGS = imaging.Segmentation(dish_radius_fraction=0.86, min_area_px=12, background_px=30.0)


def _dish(rng: np.random.Generator, tilt: float) -> np.ndarray:
    rows, cols = np.mgrid[:SIZE, :SIZE]
    r = np.hypot(rows - SIZE / 2, cols - SIZE / 2) / (SIZE / 2)
    light = (0.88 - 0.25 * r ** 2) * (1 + tilt * (cols / SIZE - 0.5))
    image = light.copy()
    image[(r > 0.93) & (r < 0.98)] *= 0.45  # the dish rim
    return image


def _worm(image: np.ndarray, y: float, x: float, angle: float, length: float = 13.0, width: float = 3.0) -> None:
    dy, dx = math.sin(angle) * length / 2, math.cos(angle) * length / 2
    ny, nx = math.cos(angle) * width / 2, -math.sin(angle) * width / 2
    corners_y = [y - dy - ny, y - dy + ny, y + dy + ny, y + dy - ny]
    corners_x = [x - dx - nx, x - dx + nx, x + dx + nx, x + dx - nx]
    rr, cc = draw.polygon(corners_y, corners_x, shape=image.shape)
    image[rr, cc] *= 0.3


def frames_for(seed: int, leave_at_s: float | None) -> list[np.ndarray]:
    """The frames of one dish; the worms start to move apart at `leave_at_s` (None: they stay)."""
    py = random.Random(seed)
    rng = np.random.default_rng(seed)
    tilt = py.uniform(-0.3, 0.3)
    centre = (SIZE / 2 + py.uniform(-8, 8), SIZE / 2 + py.uniform(-8, 8))
    worms = [(2 * math.pi * k / WORMS + py.uniform(-0.2, 0.2), py.uniform(2, 7), py.uniform(0, math.pi),
              py.uniform(0.10, 0.22)) for k in range(WORMS)]
    pictures = []
    for i in range(FRAMES):
        t = i * INTERVAL_S
        image = _dish(rng, tilt)
        moved = 0.0 if leave_at_s is None else max(0.0, t - leave_at_s)
        for bearing, r0, heading, speed in worms:
            r = min(r0 + speed * moved, SIZE * 0.36)
            _worm(image, centre[0] + r * math.sin(bearing), centre[1] + r * math.cos(bearing), heading + 0.1 * i)
        image += rng.normal(0, 0.015, image.shape)
        pictures.append(np.clip(image, 0, 1))
    return pictures


def _png(image: np.ndarray, name: str) -> SimpleUploadedFile:
    body = iio.imwrite("<bytes>", (image * 255).astype(np.uint8), extension=".png")
    return SimpleUploadedFile(name, body, content_type="image/png")


def add_series(*, study, user, seed: int) -> int:
    """Photo series for SERIES of the study's scored trials, measured now; returns how many."""
    py = random.Random(seed * 31 + 5)
    trials = [t for t in study.trials.counting().order_by("slot") if t.is_scored]
    chosen = sorted(py.sample(trials, min(SERIES, len(trials))), key=lambda t: t.slot)
    censored = [t for t in chosen if t.censored]
    late = censored[0].pk if censored else None
    for trial in chosen:
        if trial.censored:
            leave = 470.0 if trial.pk == late else None  # loosens just before the window ends
        else:
            leave = max(0.0, trial.disperse_s - 75 + py.uniform(-40, 40))
        files = [_png(image, f"{trial.code}-{i * int(INTERVAL_S):03d}s.png")
                 for i, image in enumerate(frames_for(seed * 1000 + trial.slot, leave))]
        m = measuring.start(user=user, trial=trial, source=ImageMeasurement.Source.PHOTOS, uploads=files,
                            options=measuring.Options(interval_s=INTERVAL_S, segmentation=SETTINGS), background=False)
        if m.status != ImageMeasurement.Status.DONE:
            raise RuntimeError(f"Demo measurement of {trial.code} failed: {m.error}")
    return len(chosen)
