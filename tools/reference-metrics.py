#!/usr/bin/env python3
"""Reference values for Kiln's metric tests, computed with scikit-image, numpy and scipy.

Writes tests/fixtures/metrics/: distorted versions of scikit-image sample photographs (as PNG),
and reference.json with PSNR and SSIM from scikit-image, MS-SSIM from an independent numpy/scipy
implementation of Wang, Simoncelli & Bovik (2003), BD-rate/BD-PSNR from numpy.polyfit, and
Pillow's decode of a JPEG written by the jpeg-encoder crate (cross-check of the JPEG decoder).

  pip install numpy scipy scikit-image pillow
  cargo run --release --example jpeg_fixture     # writes the JPEG this script decodes
  python3 tools/reference-metrics.py
"""
import io, json, os
import numpy as np
import PIL, scipy, skimage
from PIL import Image
from scipy.ndimage import gaussian_filter
from skimage import data
from skimage.metrics import peak_signal_noise_ratio, structural_similarity

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
OUT = os.path.join(ROOT, "tests", "fixtures", "metrics")
WEIGHTS = [0.0448, 0.2856, 0.3001, 0.2363, 0.1333]


def ssim_terms(a, b):
    """Mean SSIM and mean contrast-structure of two float planes, 11x11 Gaussian (sigma 1.5),
    valid region only (5-pixel border cropped), population covariances."""
    c1, c2 = (0.01 * 255) ** 2, (0.03 * 255) ** 2
    f = lambda x: gaussian_filter(x, 1.5, truncate=3.5, mode="reflect")[5:-5, 5:-5]
    ma, mb = f(a), f(b)
    va, vb, cov = f(a * a) - ma * ma, f(b * b) - mb * mb, f(a * b) - ma * mb
    cs = (2 * cov + c2) / (va + vb + c2)
    return float(np.mean((2 * ma * mb + c1) / (ma * ma + mb * mb + c1) * cs)), float(np.mean(cs))


def ms_ssim(x, y):
    vals = []
    for ch in range(x.shape[2]):
        a, b = x[..., ch].astype(np.float64), y[..., ch].astype(np.float64)
        v = 1.0
        for j, w in enumerate(WEIGHTS):
            s, cs = ssim_terms(a, b)
            v *= max(s if j == 4 else cs, 0.0) ** w
            if j < 4:
                h, wd = a.shape[0] // 2 * 2, a.shape[1] // 2 * 2
                a = a[:h, :wd].reshape(h // 2, 2, wd // 2, 2).mean(axis=(1, 3))
                b = b[:h, :wd].reshape(h // 2, 2, wd // 2, 2).mean(axis=(1, 3))
        vals.append(v)
    return float(np.mean(vals))


def bd(anchor, test, rate_axis):
    """numpy.polyfit cubic, integrated over the overlap (VCEG-M33)."""
    a, t = np.array(anchor, float), np.array(test, float)
    if rate_axis:  # BD-rate: log-rate as a function of PSNR
        xa, ya, xt, yt = a[:, 1], np.log(a[:, 0]), t[:, 1], np.log(t[:, 0])
    else:  # BD-PSNR: PSNR as a function of log-rate
        xa, ya, xt, yt = np.log(a[:, 0]), a[:, 1], np.log(t[:, 0]), t[:, 1]
    lo, hi = max(xa.min(), xt.min()), min(xa.max(), xt.max())
    pa, pt = np.polyint(np.polyfit(xa, ya, 3)), np.polyint(np.polyfit(xt, yt, 3))
    d = (np.polyval(pt, hi) - np.polyval(pt, lo) - np.polyval(pa, hi) + np.polyval(pa, lo)) / (hi - lo)
    return float(np.exp(d) - 1) if rate_axis else float(d)


def main():
    os.makedirs(OUT, exist_ok=True)
    rng = np.random.default_rng(0)
    sources = {"chelsea": data.chelsea(), "camera": data.camera()[128:384, 128:384]}
    pairs = []
    for name, img in sources.items():
        Image.fromarray(img).save(os.path.join(OUT, f"{name}.png"))
        buf = io.BytesIO(); Image.fromarray(img).save(buf, format="JPEG", quality=20)
        jpeg = np.asarray(Image.open(buf))
        noisy = np.clip(img.astype(np.float64) + rng.normal(0, 8, img.shape), 0, 255).round().astype(np.uint8)
        for kind, dist in (("jpeg20", jpeg), ("noise8", noisy)):
            fname = f"{name}-{kind}.png"
            Image.fromarray(dist).save(os.path.join(OUT, fname))
            x3 = img if img.ndim == 3 else img[..., None]
            y3 = dist if dist.ndim == 3 else dist[..., None]
            pairs.append({
                "reference": f"{name}.png", "distorted": fname,
                "psnr": float(peak_signal_noise_ratio(img, dist, data_range=255)),
                "ssim": float(structural_similarity(img, dist, gaussian_weights=True, sigma=1.5,
                                                    use_sample_covariance=False, data_range=255,
                                                    channel_axis=2 if img.ndim == 3 else None)),
                "ms_ssim": ms_ssim(x3, y3),
            })
    # Two rate-distortion curves: Pillow JPEG on chelsea, and a second curve with other rates.
    img = data.chelsea()
    curve_a = []
    for q in (10, 20, 35, 50, 70, 90):
        buf = io.BytesIO(); Image.fromarray(img).save(buf, format="JPEG", quality=q)
        dec = np.asarray(Image.open(io.BytesIO(buf.getvalue())))
        curve_a.append((8 * buf.tell() / (img.shape[0] * img.shape[1]), float(peak_signal_noise_ratio(img, dec))))
    curve_b = [(r * (0.7 + 0.05 * i), p + 0.1 * i) for i, (r, p) in enumerate(curve_a)]
    bdrate = {"anchor": curve_a, "test": curve_b, "bd_rate": bd(curve_a, curve_b, True), "bd_psnr": bd(curve_a, curve_b, False)}
    # Pillow's decode of the jpeg-encoder crate's 4:2:0 output.
    jpeg_check = None
    jpath = os.path.join(OUT, "chelsea-q50-420.jpg")
    if os.path.exists(jpath):
        dec = np.asarray(Image.open(jpath).convert("RGB"))
        jpeg_check = {"file": "chelsea-q50-420.jpg", "reference": "chelsea.png",
                      "pillow_psnr": float(peak_signal_noise_ratio(img, dec, data_range=255))}
    ref = {"generated_by": "tools/reference-metrics.py",
           "libraries": {"scikit-image": skimage.__version__, "numpy": np.__version__, "scipy": scipy.__version__,
                         "pillow": PIL.__version__},
           "ssim_settings": "gaussian_weights=True, sigma=1.5, use_sample_covariance=False, data_range=255",
           "pairs": pairs, "bd": bdrate, "jpeg_decode": jpeg_check}
    with open(os.path.join(OUT, "reference.json"), "w") as f:
        json.dump(ref, f, indent=1)
    print(json.dumps(ref, indent=1)[:1500])


if __name__ == "__main__":
    main()
