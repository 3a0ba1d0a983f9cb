"""experiments/imaging.py and frames.py: clusters in synthetic dish images, the dispersal rule, a library sample.

The synthetic pictures are drawn with skimage.draw; the expected numbers come from the drawing itself
(how many discs, which touch) and, for areas, from scipy.ndimage.label on the drawn mask: an
independent count of the same truth the measurement must recover through noise and uneven light.
"""
import io

import numpy as np
import pytest
from scipy import ndimage
from skimage import data, draw

from experiments import frames, imaging
from experiments.imaging import Segmentation, dispersal, measure_frame, measure_series
from tests.experiments.dish_pictures import canvas, discs, mp4, png, ring

def truth(mask):
    """(components, largest fraction, total area) of the drawn mask, by scipy (8-connected)."""
    labels, n = ndimage.label(mask, structure=np.ones((3, 3)))
    areas = np.bincount(labels.ravel())[1:]
    return n, areas.max() / areas.sum(), int(areas.sum())


SEPARATE = [(40, 40), (40, 150), (150, 40), (150, 150), (100, 95), (40, 95), (150, 95)]


@pytest.mark.parametrize("n", [1, 3, 7])
def test_separated_discs_are_counted_one_cluster_each(n):
    image = canvas()
    mask = discs(image, SEPARATE[:n], 12)
    m = measure_frame(image)
    assert m.cluster_count == n
    assert m.largest_cluster_fraction == pytest.approx(1 / n, abs=0.01)  # equal discs
    assert m.worm_area_px == pytest.approx(truth(mask)[2], rel=0.05)


def test_touching_discs_are_one_cluster_with_the_right_largest_fraction():
    image = canvas()
    mask = discs(image, [(100, 80), (100, 119)], 20)  # centres 39 px apart: the discs share an edge
    mask |= discs(image, [(40, 40)], 10)
    n, fraction, _area = truth(mask)
    assert n == 2  # the drawing itself: one clump of two, one single
    m = measure_frame(image)
    assert m.cluster_count == 2
    assert m.largest_cluster_fraction == pytest.approx(fraction, abs=0.02)


def test_gaussian_noise_changes_neither_count_nor_fraction():
    image = canvas()
    mask = discs(image, [(100, 86), (100, 114), (40, 40), (160, 160)], 15)  # the first two overlap
    noisy = image + np.random.default_rng(7).normal(0, 0.05, image.shape)
    n, fraction, _area = truth(mask)
    m = measure_frame(noisy)
    assert (m.cluster_count, n) == (3, 3)
    assert m.largest_cluster_fraction == pytest.approx(fraction, abs=0.03)


def test_an_empty_noisy_dish_has_no_worms():
    image = canvas() + np.random.default_rng(3).normal(0, 0.05, (200, 200))
    m = measure_frame(image)
    assert m.cluster_count == 0
    assert m.largest_cluster_fraction is None
    assert m.worm_area_px == 0


def lit_unevenly(image):
    """Light falling from 15 % on the left to 100 % on the right."""
    return image * np.linspace(0.15, 1.0, image.shape[1])[None, :]


def test_uneven_lighting_is_flattened():
    image = canvas()
    mask = discs(image, SEPARATE[:5], 12)
    dim = lit_unevenly(image)
    assert dim[100, 0] < dim[40, 150]  # the dim side of the dish is darker than a worm on the lit side
    m = measure_frame(dim)
    assert m.cluster_count == 5
    assert m.worm_area_px == pytest.approx(truth(mask)[2], rel=0.1)
    noisy = measure_frame(dim + np.random.default_rng(5).normal(0, 0.02, dim.shape))
    assert noisy.cluster_count == 5


def test_without_flattening_uneven_lighting_merges_the_dark_side_into_the_worms():
    # Why the correction is on by default: one global level takes the dim side of the dish for worms.
    image = canvas()
    discs(image, SEPARATE[:5], 12)
    m = measure_frame(lit_unevenly(image), settings=Segmentation(background_px=None))
    assert m.cluster_count != 5
    assert m.largest_cluster_fraction > 0.5


def test_bright_worms_with_bright_polarity_measure_as_dark_worms_do():
    image = canvas()
    discs(image, [(100, 80), (100, 119), (40, 40)], 18)
    dark = measure_frame(image)
    bright = measure_frame(1 - image, settings=Segmentation(polarity="bright"))
    assert (bright.cluster_count, bright.worm_area_px) == (dark.cluster_count, dark.worm_area_px)


def test_the_dish_mask_leaves_out_a_dark_rim():
    image = canvas()
    rr, cc = draw.circle_perimeter(100, 100, 97, shape=image.shape)
    rim = np.zeros(image.shape, dtype=bool)
    rim[rr, cc] = True
    image[ndimage.binary_dilation(rim, iterations=2)] = 0.3
    discs(image, [(100, 100), (60, 60)], 12)
    assert measure_frame(image).cluster_count == 3  # the rim is one more "cluster"
    m = measure_frame(image, settings=Segmentation(dish_radius_fraction=0.9))
    assert m.cluster_count == 2


def test_specks_below_the_smallest_area_are_ignored():
    image = canvas()
    discs(image, [(100, 100)], 12)
    discs(image, [(40, 40), (40, 160)], 1.5)  # about 9 px each
    assert measure_frame(image, settings=Segmentation(min_area_px=5)).cluster_count == 3
    assert measure_frame(image, settings=Segmentation(min_area_px=30)).cluster_count == 1


def test_scale_turns_areas_into_square_millimetres():
    image = canvas()
    discs(image, [(100, 100)], 20)
    m = measure_frame(image, scale_px_per_mm=10.0)
    assert m.worm_area_mm2 == pytest.approx(m.worm_area_px / 100)
    assert m.largest_cluster_area_mm2 == pytest.approx(m.largest_cluster_area_px / 100)
    assert measure_frame(image).worm_area_mm2 is None


def test_a_large_frame_is_measured_at_working_size_with_areas_in_its_own_pixels():
    small = canvas(200)
    discs(small, SEPARATE[:4], 12)
    big = np.kron(small, np.ones((12, 12)))  # 2400 px square, every disc 12 times larger
    m = measure_frame(big, settings=Segmentation(smoothing_px=12, background_px=480, min_area_px=1700))
    assert m.working_scale == pytest.approx(1024 / 2400)
    assert m.cluster_count == 4
    assert m.worm_area_px == pytest.approx(measure_frame(small).worm_area_px * 144, rel=0.05)


def test_every_setting_is_reported_with_the_frame():
    s = Segmentation(polarity="bright", min_area_px=20, dish_radius_fraction=0.8)
    m = measure_frame(canvas(), settings=s)
    assert m.settings == s.as_dict()
    assert m.settings["min_area_px"] == 20 and m.settings["dish_radius_fraction"] == 0.8


def test_colour_and_integer_pictures_are_read_as_grey():
    image = canvas()
    discs(image, SEPARATE[:3], 12)
    rgb = np.repeat((image * 255).astype(np.uint8)[..., None], 3, axis=2)
    assert measure_frame(rgb).cluster_count == 3
    assert measure_frame((image * 65535).astype(np.uint16)).cluster_count == 3


@pytest.mark.parametrize("kwargs,words", [({"polarity": "grey"}, "polarity"), ({"min_area_px": 0}, "minimum area"),
                                          ({"dish_radius_fraction": 3}, "dish radius"),
                                          ({"threshold": 1.5}, "contrast threshold")])
def test_impossible_settings_are_refused_by_name(kwargs, words):
    with pytest.raises(ValueError, match=words):
        Segmentation(**kwargs)


def test_a_tiny_or_shapeless_image_is_refused_with_its_size():
    with pytest.raises(ValueError, match="too small"):
        measure_frame(np.zeros((8, 300)))
    with pytest.raises(ValueError, match="shape"):
        measure_frame(np.zeros((4, 50, 50, 2)))


# ---------------------------------------------------------------------------------------------
# A sample picture the library ships
# ---------------------------------------------------------------------------------------------
def test_skimage_coins_bright_on_dark_and_unevenly_lit():
    # skimage.data.coins(): "Greek coins from Pompeii ... several coins outlined against a gray background ...
    # The background shares enough grey levels with the coins that a simple segmentation is not sufficient"
    # (the function's docstring). The docs give no count: 24 (four rows of six, none touching) is
    # counted by eye in the picture itself.
    coins = data.coins()
    flattened = measure_frame(coins, settings=Segmentation(polarity="bright", min_area_px=100))
    assert flattened.cluster_count == 24
    # The docstring's warning, seen: one global level merges coins and background into a large false clump.
    simple = measure_frame(coins, settings=Segmentation(polarity="bright", min_area_px=100, background_px=None))
    assert simple.cluster_count < 24
    assert simple.cluster_areas_px[0] > 3 * flattened.cluster_areas_px[0]


def test_skimage_coins_count_does_not_depend_on_the_background_scale_or_orientation():
    coins = data.coins()
    counts = {measure_frame(img, settings=Segmentation(polarity="bright", min_area_px=100, background_px=bg)).cluster_count
              for bg in (20, 40, 60) for img in (coins, np.rot90(coins), coins[:, ::-1])}
    assert counts == {24}


# ---------------------------------------------------------------------------------------------
# Series
# ---------------------------------------------------------------------------------------------
def frame(spread: float, rng=None):
    return ring(spread, rng)


def test_a_series_with_a_known_dispersal_time():
    rng = np.random.default_rng(11)
    times = [0, 30, 60, 90, 120, 150, 180, 210, 240]
    spreads = [1, 1, 2, 1, 1, 2, 2.3, 2.6, 3]  # a brief loosening at 60 s, gone again; apart for good from 150 s
    series = measure_series([frame(s, rng) for s in spreads], times, threshold=0.5, window_s=240)
    fractions = [f.largest_cluster_fraction for f in series.frames]
    assert fractions[0] == pytest.approx(1.0) and fractions[2] == pytest.approx(1 / 8, abs=0.02)
    assert series.dispersal_time_s == 150  # the first frame after which it stays below 0.5
    assert series.censored is False
    assert series.observed_until_s == 240 and series.covers_window
    assert [f.cluster_count for f in series.frames][:3] == [1, 1, 8]


def test_a_series_that_never_disperses_is_censored():
    series = measure_series([frame(1) for _ in range(5)], [0, 60, 120, 180, 240], window_s=240)
    assert series.censored is True
    assert series.dispersal_time_s is None


def test_frames_after_the_window_do_not_count():
    series = measure_series([frame(1), frame(1), frame(3)], [0, 100, 200], window_s=150)
    assert series.censored is True and series.observed_until_s == 100
    assert not measure_series([frame(1), frame(3)], [0, 100], window_s=50).covers_window


def test_progress_is_reported_per_frame():
    seen = []
    measure_series([frame(1), frame(2)], [0, 10], window_s=10, progress=seen.append)
    assert seen == [1, 2]


def test_dispersal_rule_skips_frames_without_worms():
    assert dispersal([0, 10, 20, 30], [0.9, 0.3, None, 0.2], threshold=0.5, window_s=30) == (10, False, 30)
    assert dispersal([0, 10, 20], [0.9, 0.3, 0.7], threshold=0.5, window_s=30) == (None, True, 20)
    assert dispersal([0, 10], [0.5, 0.5], threshold=0.5, window_s=30)[1] is True  # not below: still clumped


@pytest.mark.parametrize("times,words", [([0, 10, 10], "must increase"), ([-5, 10, 20], "0 or more"),
                                         ([0, 10], "2 frames for|frames than times")])
def test_bad_times_are_refused_by_name(times, words):
    with pytest.raises(ValueError, match=words):
        measure_series([frame(1)] * 3, times, window_s=100)


def test_proposed_clusters_keep_the_dispersal_frame_and_at_most_a_dozen_points():
    rows = [{"t_s": float(t), "clusters": 1 if t < 333 else 8, "largest_fraction": 1.0 if t < 333 else 0.125}
            for t in range(0, 600, 3)]
    points = imaging.proposed_clusters(rows, dispersal_time_s=333.0, window_s=600)
    assert len(points) <= 13
    assert {"t_s": 333.0, "clusters": 8, "largest_fraction": 0.125} in points
    assert points[0]["t_s"] == 0 and points[-1]["t_s"] == 597


# ---------------------------------------------------------------------------------------------
# Frames from files
# ---------------------------------------------------------------------------------------------
def test_photo_times_count_from_the_stimulus():
    assert frames.photo_times(5, interval_s=30, stimulus_at_s=45) == [(2, 15.0), (3, 45.0), (4, 75.0)]
    assert frames.frame_times(10, interval_s=60, stimulus_at_s=0, until_s=180) == [0, 60, 120, 180]


def _png(image) -> io.BytesIO:
    return io.BytesIO(png(image))


def test_photos_of_different_sizes_are_refused_naming_the_photo():
    with pytest.raises(frames.FrameError, match="'b.png' is 100×100 px but the first is 200×200"):
        frames.probe_photos([_png(canvas(200)), _png(canvas(100))], ["a.png", "b.png"], interval_s=10, stimulus_at_s=0)


def test_a_photo_that_is_not_a_picture_is_refused_naming_it():
    with pytest.raises(frames.FrameError, match="'x.png' could not be read"):
        frames.probe_photos([io.BytesIO(b"\x89PNG\r\n\x1a\nbroken")], ["x.png"], interval_s=10, stimulus_at_s=0)


def test_too_many_frames_are_refused_with_the_limit():
    with pytest.raises(frames.FrameError, match=f"limit of {frames.MAX_FRAMES}"):
        frames.probe_photos([_png(canvas(32))] * (frames.MAX_FRAMES + 1), ["p.png"] * (frames.MAX_FRAMES + 1),
                            interval_s=1, stimulus_at_s=0)


def test_a_video_is_sampled_at_the_interval_after_the_stimulus_and_measured():
    body = mp4([1, 1, 1, 2.5, 3])  # 25 s: clumped for 15 s, then apart
    plan = frames.probe_video(io.BytesIO(body), "dish.mp4", interval_s=5, stimulus_at_s=5)
    assert plan.duration_s == pytest.approx(25, abs=0.6)
    assert plan.times_s == (0, 5, 10, 15)
    pairs = list(frames.video_frames(io.BytesIO(body), plan, stimulus_at_s=5))
    series = measure_series([img for _t, img in pairs], [t for t, _img in pairs], window_s=15)
    assert series.dispersal_time_s == 10  # video second 15 = 10 s after a stimulus at 5 s
    assert [f.cluster_count for f in series.frames] == [1, 1, 8, 8]


def test_a_file_that_is_not_a_video_is_refused_naming_it():
    with pytest.raises(frames.FrameError, match="'v.mp4' could not be opened as a video"):
        frames.probe_video(io.BytesIO(b"\x00\x00\x00\x18ftypmp42" + b"\x00" * 64), "v.mp4", interval_s=5,
                           stimulus_at_s=0)
