"""Synthetic dish pictures for the image-measurement tests: discs drawn with skimage.draw, as PNG or MP4 bytes."""
import io

import av
import imageio.v3 as iio
import numpy as np
from skimage import draw

DISH, WORM = 0.85, 0.2  # grey levels: a light dish, dark worms
RING = [(100 + 30 * np.sin(a), 100 + 30 * np.cos(a)) for a in np.linspace(0, 2 * np.pi, 8, endpoint=False)]


def canvas(size=200):
    return np.full((size, size), DISH)


def discs(image, centres, radius, value=WORM):
    mask = np.zeros(image.shape, dtype=bool)
    for r, c in centres:
        rr, cc = draw.disk((r, c), radius, shape=image.shape)
        mask[rr, cc] = True
    image[mask] = value
    return mask


def ring(spread: float, rng=None):
    """Eight worms on a ring of radius 30·spread: touching (one clump) at 1, apart from about 1.7."""
    image = canvas()
    discs(image, [(100 + (r - 100) * spread, 100 + (c - 100) * spread) for r, c in RING], 12)
    if rng is not None:
        image = image + rng.normal(0, 0.03, image.shape)
    return image


def png(image, size=None) -> bytes:
    return iio.imwrite("<bytes>", (np.clip(image, 0, 1) * 255).astype(np.uint8), extension=".png")


def mp4(spreads, fps=2, seconds_per_step=5) -> bytes:
    """An MP4 (MPEG-4 part 2, FFmpeg's own encoder) of ring frames, each spread held for some seconds."""
    buffer = io.BytesIO()
    container = av.open(buffer, mode="w", format="mp4")
    stream = container.add_stream("mpeg4", rate=fps)
    stream.width = stream.height = 200
    stream.pix_fmt = "yuv420p"
    for spread in spreads:
        grey = (ring(spread) * 255).astype(np.uint8)
        for _ in range(fps * seconds_per_step):
            picture = av.VideoFrame.from_ndarray(np.repeat(grey[..., None], 3, axis=2), format="rgb24")
            for packet in stream.encode(picture):
                container.mux(packet)
    for packet in stream.encode():
        container.mux(packet)
    container.close()
    return buffer.getvalue()
