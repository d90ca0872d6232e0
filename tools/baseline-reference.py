#!/usr/bin/env python3
"""Reference points for Kiln's standard-codec baselines, from the codecs' own libraries.

For the two scikit-image photographs in tests/fixtures/metrics (camera: grey 256x256; chelsea:
RGB 451x300), codes each at the settings `kiln evaluate` uses, through Pillow (libjpeg, libwebp)
and imagecodecs (OpenJPEG), and writes tests/fixtures/baselines/reference.json: for each
point the file size, the PSNR of the reference library's own decode, and the file itself
(base64), so that tests can check Kiln's encoders land near the reference library at the same
settings and Kiln's decoders agree with the reference decoders on the reference files.

  python3 tools/baseline-reference.py          # pip install numpy pillow imagecodecs
"""
import base64
import io
import json
import pathlib

import imagecodecs
import numpy as np
import PIL
from PIL import Image, features

ROOT = pathlib.Path(__file__).resolve().parent.parent
SRC = ROOT / "tests/fixtures/metrics"
OUT = ROOT / "tests/fixtures/baselines"

# The sweeps' settings Kiln's tests compare at (a subset of each sweep, to keep the fixture small).
SETTINGS = {
    "jpeg": [20, 50, 90],
    "jpeg2000": [30.0, 36.0, 43.0],
    "webp": [15.0, 50.0, 85.0],
    "webp-lossless": [None],
    "jpeg2000-lossless": [None],
    # libavif/libaom files (4:4:4) for the decoder check; the encoders differ (Kiln uses rav1e),
    # so the encoder is compared by its whole curve ("avif-curve") instead of point by point.
    "avif": [25, 55, 80],
}

# libavif/libaom at speed 4 and its default pixel format, as ../shared/tools/rd_check.py codes.
AVIF_CURVE_LEVELS = (10, 25, 40, 55, 70, 80, 90)


def psnr(a, b):
    mse = np.mean((a.astype(np.float64) - b.astype(np.float64)) ** 2)
    return float("inf") if mse == 0 else 10 * np.log10(255.0**2 / mse)


def grey_of(rgb):
    # Kiln decodes a grey image that a codec stored as RGB to the rounded channel mean.
    s = rgb.astype(np.uint16).sum(axis=2)
    return ((s + 1) // 3).astype(np.uint8)


def code(codec, img, setting):
    grey = img.ndim == 2
    if codec == "jpeg":
        buf = io.BytesIO()
        Image.fromarray(img).save(buf, "JPEG", quality=setting, subsampling=2, optimize=True)
        data = buf.getvalue()
        dec = np.asarray(Image.open(io.BytesIO(data)))
    elif codec in ("webp", "webp-lossless"):
        rgb = np.stack([img] * 3, axis=2) if grey else img
        buf = io.BytesIO()
        if codec == "webp":
            Image.fromarray(rgb).save(buf, "WEBP", quality=setting, method=6)
        else:
            Image.fromarray(rgb).save(buf, "WEBP", lossless=True, quality=100, method=6)
        data = buf.getvalue()
        dec = np.asarray(Image.open(io.BytesIO(data)).convert("RGB"))
        dec = grey_of(dec) if grey else dec
    elif codec == "jpeg2000":
        data = imagecodecs.jpeg2k_encode(img, level=setting, codecformat="J2K")
        dec = imagecodecs.jpeg2k_decode(data)
    elif codec == "avif":
        rgb = np.stack([img] * 3, axis=2) if grey else img
        data = imagecodecs.avif_encode(rgb, level=setting, speed=4, pixelformat="444")
        dec = imagecodecs.avif_decode(data)
        dec = grey_of(dec) if grey else dec
    elif codec == "avif-curve":
        rgb = np.stack([img] * 3, axis=2) if grey else img
        data = imagecodecs.avif_encode(rgb, level=setting, speed=4)
        dec = imagecodecs.avif_decode(data)
        dec = grey_of(dec) if grey else dec
    elif codec == "jpeg2000-lossless":
        data = imagecodecs.jpeg2k_encode(img, level=0, codecformat="J2K", reversible=True)
        dec = imagecodecs.jpeg2k_decode(data)
    else:
        raise ValueError(codec)
    return bytes(data), psnr(img, dec)


def main():
    OUT.mkdir(parents=True, exist_ok=True)
    points = []
    for name in ("camera", "chelsea"):
        img = np.asarray(Image.open(SRC / f"{name}.png"))
        for codec, settings in list(SETTINGS.items()) + [("avif-curve", AVIF_CURVE_LEVELS)]:
            for s in settings:
                data, p = code(codec, img, s)
                points.append({
                    "image": f"{name}.png",
                    "codec": codec,
                    "setting": "" if s is None else str(s),
                    "bytes": len(data),
                    "psnr": None if p == float("inf") else round(p, 4),
                    # Lossless files are checked by exactness; only lossy ones are stored.
                    "file": None if s is None or codec == "avif-curve" else base64.b64encode(data).decode(),
                })
                print(f"{name:8} {codec:18} {str(s):6} {len(data):7} B  {p:.3f} dB")
    meta = {
        "source": "tools/baseline-reference.py; images: scikit-image data (camera, chelsea)",
        "libraries": {
            "Pillow": PIL.__version__,
            "imagecodecs": imagecodecs.__version__,
            "libjpeg (Pillow)": features.version("jpg"),
            "libwebp (Pillow)": features.version("webp"),
            "openjpeg (imagecodecs)": imagecodecs.version(dict).get("openjpeg", ""),
            "libavif (imagecodecs)": imagecodecs.version(dict).get("libavif", ""),
        },
        "settings": "jpeg: Pillow quality, 4:2:0, optimize; jpeg2000: imagecodecs level = target PSNR, J2K "
        "codestream, 9/7 (lossless: reversible 5/3); webp: Pillow method 6 (lossless: quality 100); "
        "avif: imagecodecs level, speed 4, 4:4:4 (avif-curve: its default pixel format)",
        "points": points,
    }
    (OUT / "reference.json").write_text(json.dumps(meta, indent=1) + "\n")


if __name__ == "__main__":
    main()
