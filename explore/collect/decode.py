"""Collect: decoding image files (formats, size limit, EXIF orientation, RGB conversion)."""

from __future__ import annotations

import hashlib
import io
import warnings
from pathlib import Path

import numpy as np
from PIL import Image, ImageOps, UnidentifiedImageError

#: Image formats we decode (PIL plugin names; the JPEG plugin also opens MPO,
#: the multi-picture JPEG many phones write). Limiting PIL to these keeps
#: rarely used decoders away.
FORMATS = ("JPEG", "PNG", "WEBP", "GIF", "BMP", "TIFF")

#: Largest image accepted, in pixels. This equals PIL's own decompression-bomb
#: error level (2 x ``Image.MAX_IMAGE_PIXELS`` = 2 x 89,478,485 in Pillow's
#: defaults), so a 108-megapixel phone photo passes and a crafted bomb does not.
MAX_PIXELS = 178_956_970

# collect_images applies MAX_PIXELS to every header itself, so PIL's warning
# (issued at half that size) would only repeat what the table already says.
warnings.filterwarnings("ignore", category=Image.DecompressionBombWarning)


class ImageProblem(Exception):
    """One file cannot be used; ``status`` is the skip kind, the message the reason."""

    def __init__(self, status: str, reason: str):
        super().__init__(reason)
        self.status = status
        self.reason = reason




def open_rgb(
    path: str | Path,
    draft_size: int | None = None,
    max_pixels: int = MAX_PIXELS,
    expect_sha256: str | None = None,
    data: bytes | None = None,
) -> Image.Image:
    """Decode one image file to an upright 8-bit RGB PIL image.

    Parameters
    ----------
    path : the image file.
    draft_size : when given, JPEGs are decoded at a reduced scale (1/2, 1/4 or
        1/8, libjpeg's DCT scaling) chosen so both sides stay at least this
        many pixels. Much cheaper than a full decode when the model input is
        small. Other formats are decoded in full, then shrunk by a whole
        factor (box filter) while both sides stay at least this size.
    max_pixels : images larger than this are refused (decompression bombs).
    expect_sha256 : when given, the file's bytes must still hash to this
        (so vectors are never stored under the hash of other content).
    data : the file's bytes, when they were read elsewhere (a cluster worker
        that cannot see ``path`` gets them from the driver); ``path`` is then
        only named in messages.

    Returns
    -------
    PIL.Image.Image in mode ``RGB``, EXIF orientation applied.

    Raises
    ------
    ImageProblem with ``status`` one of ``empty``, ``unreadable``, ``not_image``,
    ``too_large``, ``truncated``, ``corrupt``, or ``changed`` (content differs
    from ``expect_sha256``).
    """
    if data is None:
        data = _read_bytes(Path(path))
    elif not data:
        raise ImageProblem("empty", "the file is empty (0 bytes)")
    if expect_sha256 is not None and hashlib.sha256(data).hexdigest() != expect_sha256:
        raise ImageProblem("changed", "the file's content changed since it was collected")
    image, _ = _decode(data, draft_size, max_pixels)
    return image


def _read_bytes(path: Path) -> bytes:
    try:
        with open(path, "rb") as f:
            data = f.read()
    except PermissionError:
        raise ImageProblem("unreadable", "permission denied when reading the file") from None
    except FileNotFoundError:
        raise ImageProblem("missing", "the file no longer exists (or is a broken link)") from None
    except IsADirectoryError:
        raise ImageProblem("bad_row", "the path is a folder, not a file") from None
    except OSError as exc:
        raise ImageProblem("unreadable", f"cannot read the file: {exc.strerror or exc}") from None
    if not data:
        raise ImageProblem("empty", "the file is empty (0 bytes)")
    return data


def _decode(data: bytes, draft_size: int | None, max_pixels: int) -> tuple[Image.Image, tuple[int, int]]:
    """Bytes -> (upright RGB image, upright full-resolution (width, height))."""
    try:
        image = Image.open(io.BytesIO(data), formats=FORMATS)
    except UnidentifiedImageError:
        raise ImageProblem(
            "not_image", "not a JPEG, PNG, WebP, GIF, BMP or TIFF image that can be identified"
        ) from None
    except Image.DecompressionBombError as exc:
        raise ImageProblem("too_large", f"refused as a decompression bomb: {exc}") from None
    except Exception as exc:  # a broken header can raise almost anything inside PIL
        raise ImageProblem("corrupt", f"the image header cannot be read: {exc}") from None
    width, height = image.size
    if width * height > max_pixels:
        raise ImageProblem(
            "too_large",
            f"{width}x{height} = {width * height:,} pixels is over the limit of {max_pixels:,} "
            "(decompression-bomb protection)",
        )
    try:
        if draft_size and image.format in ("JPEG", "MPO"):
            image.draft(None, (draft_size, draft_size))
        image.load()
    except Image.DecompressionBombError as exc:
        raise ImageProblem("too_large", f"refused as a decompression bomb: {exc}") from None
    except OSError as exc:
        if "truncated" in str(exc).lower():
            raise ImageProblem("truncated", f"the file is truncated: {exc}") from None
        raise ImageProblem("corrupt", f"the image data cannot be decoded: {exc}") from None
    except Exception as exc:
        raise ImageProblem("corrupt", f"the image data cannot be decoded: {exc}") from None

    try:
        orientation = int(image.getexif().get(0x0112, 1) or 1)
    except Exception:  # malformed EXIF: keep the image, ignore the tag
        orientation = 1
    try:
        if orientation in (2, 3, 4, 5, 6, 7, 8):
            image = ImageOps.exif_transpose(image)
        rgb = to_rgb(image)
        if draft_size:  # other formats (and JPEGs libjpeg could not scale enough): box-reduce
            factor = min(rgb.size) // draft_size
            if factor >= 2:
                rgb = rgb.reduce(factor)
    except Exception as exc:
        raise ImageProblem("corrupt", f"the image cannot be converted to RGB: {exc}") from None
    if orientation in (5, 6, 7, 8):  # these orientations swap the sides
        width, height = height, width
    return rgb, (width, height)


def to_rgb(image: Image.Image) -> Image.Image:
    """Convert any PIL mode to 8-bit RGB the way a viewer would show it.

    - 16-bit and 32-bit integer greyscale (``I;16*``, ``I``) is scaled by
      255/65535 (PIL's own ``convert("L")`` clips it instead, turning most
      pixels white); float ``F`` images in [0, 1] are scaled by 255.
    - Transparent images (alpha channel or palette transparency) are
      composited over white.
    - CMYK uses the embedded ICC profile when there is one (LittleCMS via
      ``PIL.ImageCms``), else PIL's conversion.
    """
    mode = image.mode
    if mode == "RGB":
        return image
    if mode.startswith("I") or mode == "F":
        values = np.asarray(image, dtype=np.float64)
        if mode == "F" and values.size and np.nanmax(values) <= 1.0:
            values = values * 255.0
        elif mode != "F":
            values = np.clip(values, 0, 65535) * (255.0 / 65535.0)
        grey = np.clip(np.rint(np.nan_to_num(values)), 0, 255).astype(np.uint8)
        return Image.fromarray(grey, mode="L").convert("RGB")
    if mode == "P":
        if "transparency" in image.info:
            return _over_white(image.convert("RGBA"))
        return image.convert("RGB")
    if mode in ("RGBA", "RGBa", "LA", "La", "PA"):
        return _over_white(image.convert("RGBA"))
    if mode == "CMYK":
        icc = image.info.get("icc_profile")
        if icc:
            try:
                from PIL import ImageCms

                source = ImageCms.ImageCmsProfile(io.BytesIO(icc))
                return ImageCms.profileToProfile(
                    image, source, ImageCms.createProfile("sRGB"), outputMode="RGB"
                )
            except Exception:  # a broken profile: fall back to the plain formula
                pass
        return image.convert("RGB")
    return image.convert("RGB")


def _over_white(rgba: Image.Image) -> Image.Image:
    background = Image.new("RGBA", rgba.size, (255, 255, 255, 255))
    background.alpha_composite(rgba)
    return background.convert("RGB")
