"""Image folders as input tensors: PNG/JPEG files read with Pillow, preprocessed one batch at a time.

Transformation: a folder of images (optionally one sub-folder per class) and
an :class:`ImagePrep` -> an :class:`ImageArray` shaped like the model's image
input with samples first, plus integer labels (sorted class-folder names ->
0..K-1) when there are class folders. Nothing is decoded until a batch asks
for it, so memory does not grow with the folder.

Preprocessing, per image, in this order (the formula the tests check by hand):

1. decode with Pillow and convert to the channel order (``RGB``, ``BGR``) or
   to one ``gray`` channel (Pillow's ``L`` conversion, ITU-R 601-2 luma:
   L = R·299/1000 + G·587/1000 + B·114/1000);
2. resize to ``size`` = (height H, width W) with Pillow's bilinear filter
   (an image already H x W is not resampled):
   ``stretch`` resizes to W x H; ``crop`` scales by max(H/h, W/w), rounds,
   and cuts the centred H x W window; ``pad`` scales by min(H/h, W/w), rounds,
   and pastes onto an H x W canvas of 8-bit value ``pad_value``, centred
   (``pad_align`` "center") or at the top-left corner ("start");
3. value[c, i, j] = (p[c](i, j) · scale − mean[c]) / std[c], p the 8-bit
   value (0..255), mean/std one value per channel (one value: all channels);
4. lay out as ``NCHW`` or ``NHWC`` (from the model input's shape when not given).

Folder rules: files are taken in sorted path order; the content decides what a
file is (PNG or JPEG by its first bytes; ``.json``/``.txt``/``.md``/``.csv``
notes are skipped, anything else is an error); hidden entries are skipped;
symbolic links that leave the folder, non-regular files, files above
:data:`MAX_FILE_BYTES` and images above :data:`MAX_PIXELS` (a decompression
bomb guard) are refused with the file's path and the cause on one line.
"""
from __future__ import annotations

import logging
import math
import os
import stat
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from PIL import Image

from swapper.errors import BadDataError, first_line

logger = logging.getLogger(__name__)

MAX_PIXELS = 40_000_000  # width x height; far above any input a network takes (common practice, no source)
MAX_FILE_BYTES = 256 * 2**20
MAGIC = {b"\x89PNG\r\n\x1a\n": "PNG", b"\xff\xd8\xff": "JPEG"}
NOTES = {".json", ".txt", ".md", ".csv"}
RESIZE_MODES = ("stretch", "crop", "pad")
CHANNELS = ("RGB", "BGR", "gray")
LAYOUTS = ("NCHW", "NHWC")


@dataclass(frozen=True)
class ImagePrep:
    """How an image becomes one sample of the input tensor (see the module docstring)."""

    size: tuple[int, int] | None = None  # (height, width); None: the model input's fixed height and width
    resize: str = "stretch"
    channels: str = "RGB"
    layout: str | None = None  # None: from the model input's shape
    scale: float = 1.0 / 255.0
    mean: tuple[float, ...] = (0.0,)
    std: tuple[float, ...] = (1.0,)
    pad_value: int = 0
    pad_align: str = "center"

    def channel_count(self) -> int:
        return 1 if self.channels == "gray" else 3


def image_kind(path: Path) -> str | None:
    """"PNG" or "JPEG" by the file's first bytes, else None."""
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
    except OSError as exc:
        raise BadDataError(f"cannot read: {exc.strerror or exc}", path) from None
    return next((kind for magic, kind in MAGIC.items() if head.startswith(magic)), None)


def _visible(folder: Path) -> list[Path]:
    return sorted(p for p in folder.iterdir() if not p.name.startswith("."))


def _checked(entry: Path, root: Path) -> Path:
    """The real path of ``entry`` once it is known to stay inside ``root`` and to be a file or folder."""
    real = entry.resolve()
    if real != root and root not in real.parents:
        raise BadDataError(f"symbolic link leaving the folder ({real}); refused", entry)
    try:
        mode = os.stat(real).st_mode
    except OSError as exc:
        raise BadDataError(f"cannot read: {exc.strerror or exc}", entry) from None
    if not (stat.S_ISREG(mode) or stat.S_ISDIR(mode)):
        raise BadDataError("not a regular file (device, pipe or socket); refused", entry)
    return real


def _image_file(entry: Path, root: Path) -> Path | None:
    """``entry`` if it is an image file, None for a skipped note; raises for anything else."""
    real = _checked(entry, root)
    if stat.S_ISDIR(os.stat(real).st_mode):
        raise BadDataError("a folder inside a class folder; expected images only", entry)
    if real.stat().st_size > MAX_FILE_BYTES:
        raise BadDataError(f"file is larger than {MAX_FILE_BYTES >> 20} MiB; refused", entry)
    if image_kind(real) is None:
        if entry.suffix.lower() in NOTES:
            return None
        raise BadDataError("not a PNG or JPEG image (judged by its content)", entry)
    return entry


def holds_images(folder: Path) -> bool:
    """True if ``folder`` (or a sub-folder of it) holds a PNG/JPEG file, judged by content."""
    try:
        for entry in _visible(folder):
            if entry.is_file() and image_kind(entry):
                return True
            if entry.is_dir() and any(p.is_file() and image_kind(p) for p in _visible(entry)):
                return True
    except OSError as exc:
        raise BadDataError(f"cannot read the folder: {exc.strerror or exc}", getattr(exc, "filename", folder)) \
            from None
    return False


def list_images(folder: Path) -> tuple[list[Path], np.ndarray | None, list[str] | None]:
    """(image files in sorted order, labels or None, class names or None) of an image folder."""
    root = folder.resolve()
    files, classes, labels = [], [], []
    try:
        entries = _visible(folder)
    except OSError as exc:
        raise BadDataError(f"cannot list the folder: {exc.strerror or exc}", folder) from None
    dirs = [e for e in entries if _checked(e, root).is_dir()]
    tops = [e for e in entries if e not in dirs]
    if dirs and any(image_kind(_checked(e, root)) for e in tops):
        raise BadDataError("folder mixes images and class sub-folders; use one or the other", folder)
    if not dirs:
        files = [f for f in (_image_file(e, root) for e in tops) if f is not None]
    for k, d in enumerate(dirs):
        found = [f for f in (_image_file(e, root) for e in _visible(d)) if f is not None]
        if not found:
            raise BadDataError("class folder holds no images", d)
        files += found
        labels += [k] * len(found)
        classes.append(d.name)
    if not files:
        raise BadDataError("folder holds no PNG or JPEG images", folder)
    if classes:
        logger.info("%s: %d images in %d classes %s", folder, len(files), len(classes), classes)
        return files, np.asarray(labels, dtype=np.int64), classes
    return files, None, None


def check_header(path: Path) -> tuple[int, int]:
    """(width, height) from the file header, after the pixel-count guard; raises BadDataError."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("error", Image.DecompressionBombWarning)
            with Image.open(path) as img:
                width, height = img.size
    except (OSError, ValueError, SyntaxError, Image.DecompressionBombWarning, Image.DecompressionBombError) as exc:
        raise BadDataError(f"cannot read image: {first_line(exc)}", path) from None
    if width * height > MAX_PIXELS:
        raise BadDataError(f"image is {width}x{height} pixels, above the limit of {MAX_PIXELS} "
                           "(decompression-bomb guard); refused", path)
    return width, height


def _resized(img: Image.Image, prep: ImagePrep, height: int, width: int) -> Image.Image:
    w, h = img.size
    if (w, h) == (width, height):
        return img
    if prep.resize == "stretch":
        return img.resize((width, height), Image.BILINEAR)
    scale = (max if prep.resize == "crop" else min)(height / h, width / w)
    new_w, new_h = max(1, round(w * scale)), max(1, round(h * scale))
    img = img.resize((new_w, new_h), Image.BILINEAR)
    if prep.resize == "crop":
        left, top = (new_w - width) // 2, (new_h - height) // 2
        return img.crop((left, top, left + width, top + height))
    fill = (prep.pad_value,) * len(img.getbands())
    canvas = Image.new(img.mode, (width, height), fill if len(fill) > 1 else fill[0])
    at = ((width - new_w) // 2, (height - new_h) // 2) if prep.pad_align == "center" else (0, 0)
    canvas.paste(img, at)
    return canvas


def load_image(path: Path, prep: ImagePrep, height: int, width: int) -> np.ndarray:
    """One preprocessed image as float32 [H, W, C] (the module docstring's steps 1-3)."""
    check_header(path)
    try:
        with Image.open(path) as img:
            img = img.convert("L" if prep.channels == "gray" else "RGB")
            pixels = np.asarray(_resized(img, prep, height, width), dtype=np.float64)
    except (OSError, ValueError, SyntaxError) as exc:
        raise BadDataError(f"cannot read image: {first_line(exc)}", path) from None
    pixels = pixels.reshape(height, width, -1)
    if prep.channels == "BGR":
        pixels = pixels[:, :, ::-1]
    mean, std = np.asarray(prep.mean, np.float64), np.asarray(prep.std, np.float64)
    return ((pixels * prep.scale - mean) / std).astype(np.float32)


class ImageArray:
    """Samples-first, read-only array view over image files; indexing decodes only the images asked for."""

    finite = True  # values come from 8-bit pixels through a finite formula: no NaN/Inf scan needed

    def __init__(self, files: list[Path], prep: ImagePrep, height: int, width: int, layout: str):
        self.files, self.prep, self.height, self.width, self.layout = list(files), prep, height, width, layout
        c = prep.channel_count()
        self.shape = (len(self.files), c, height, width) if layout == "NCHW" else (len(self.files), height, width, c)
        self.dtype = np.dtype(np.float32)
        self.ndim = 4

    def __len__(self) -> int:
        return len(self.files)

    def __repr__(self) -> str:
        return f"ImageArray({len(self.files)} images, shape={self.shape})"

    nbytes = property(lambda self: math.prod(self.shape) * 4)

    def _one(self, i: int) -> np.ndarray:
        hwc = load_image(self.files[i], self.prep, self.height, self.width)
        return hwc.transpose(2, 0, 1) if self.layout == "NCHW" else hwc

    def __getitem__(self, key):
        if isinstance(key, tuple):
            head, rest = (key[0], key[1:]) if key else (slice(None), ())
            part = self[head]
            return part[rest] if isinstance(head, (int, np.integer)) else part[(slice(None),) + rest]
        if isinstance(key, (int, np.integer)):
            return self._one(range(len(self.files))[int(key)])
        every = range(len(self.files))
        indices = every[key] if isinstance(key, slice) else [every[int(i)] for i in np.asarray(key).ravel()]
        out = np.empty((len(indices), *self.shape[1:]), dtype=np.float32)
        for row, i in enumerate(indices):
            out[row] = self._one(int(i))
        return out

    def __array__(self, dtype=None, copy=None):
        out = self[:]
        return out.astype(dtype) if dtype is not None else out


def image_input(specs, prep: ImagePrep, folder: Path) -> tuple[str, int, int, str]:
    """(input name, height, width, layout) of the one image input ``specs`` leaves to the folder."""
    if len(specs) != 1:
        names = ", ".join(s.name for s in specs)
        raise BadDataError(f"an image folder feeds one input, but the model takes {names}; declare the others "
                           "with --constant (or 'constant' in the data description)", folder)
    spec = specs[0]
    shape = spec.shape
    if shape is None or len(shape) != 4:
        raise BadDataError(f"an image folder feeds a 4-D input, but {spec.name!r} has shape {shape}", folder)
    fixed = [d if isinstance(d, int) and d > 0 else None for d in shape]
    layout = prep.layout
    if layout is None:
        first, last = fixed[1] == prep.channel_count(), fixed[3] == prep.channel_count()
        if first == last:
            raise BadDataError(f"cannot tell whether input {spec.name!r} {tuple(shape)} is NCHW or NHWC; "
                               "give the layout", folder)
        layout = "NCHW" if first else "NHWC"
    c, h, w = (fixed[1], fixed[2], fixed[3]) if layout == "NCHW" else (fixed[3], fixed[1], fixed[2])
    if c is not None and c != prep.channel_count():
        raise BadDataError(f"input {spec.name!r} takes {c} channel(s), the preprocessing gives "
                           f"{prep.channel_count()} ({prep.channels})", folder)
    height, width = prep.size or (h, w)
    if height is None or width is None:
        raise BadDataError(f"the image size is not fixed by input {spec.name!r} {tuple(shape)}; give the size "
                           "(e.g. size=48x192)", folder)
    if prep.size and ((h and h != height) or (w and w != width)):
        raise BadDataError(f"size {height}x{width} does not fit input {spec.name!r} {tuple(shape)}", folder)
    return spec.name, int(height), int(width), layout


def read_image_folder(path: Path, specs, prep: ImagePrep | None) -> tuple[dict, list[str] | None]:
    """({input name: ImageArray, "labels": labels if class folders}, class names or None) of an image folder.

    ``specs`` are the model inputs the folder must feed (exactly one image input). Every file's
    header is checked first, so a bad file or a decompression bomb is refused before any work starts.
    """
    prep = prep or ImagePrep()
    name, height, width, layout = image_input(specs, prep, path)
    files, labels, classes = list_images(path)
    for f in files:
        check_header(f)
    raw: dict = {name: ImageArray(files, prep, height, width, layout)}
    if labels is not None:
        raw["labels"] = labels
    logger.info("%s: %d images -> input %s %s", path, len(files), name, raw[name].shape[1:])
    return raw, classes
