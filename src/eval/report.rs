//! Writing the evaluation report: `rd.csv`, `summary.json`, plots (SVG and PNG), crops and
//! `report.html`.

use std::fmt::Write as _;
use std::path::Path;

use super::plot::{Plot, Series};
use super::{ImageResult, Summary};
use crate::error::{KilnError, Result};
use crate::image_io::{Picture, write_atomic};

const KILN_COLOR: [u8; 3] = [200, 80, 30];
const JPEG_COLOR: [u8; 3] = [40, 100, 190];
const REFERENCE_COLOR: [u8; 3] = [120, 160, 60];
const CROP: u32 = 192;

fn num(v: f64) -> String {
    if v.is_finite() {
        format!("{v:.6}")
    } else if v.is_nan() {
        String::new()
    } else {
        "inf".into()
    }
}

/// `rd.csv`: one row per image, codec and setting.
pub fn rd_csv(results: &[ImageResult]) -> String {
    let mut s = String::from("image,codec,setting,bytes,bpp,psnr,ssim,ms_ssim,encode_ms,decode_ms\n");
    for r in results.iter().flat_map(|r| &r.rows) {
        let image = if r.image.contains([',', '"']) {
            format!("\"{}\"", r.image.replace('"', "\"\""))
        } else {
            r.image.clone()
        };
        let _ = writeln!(
            s,
            "{image},{},{},{},{},{},{},{},{:.2},{:.2}",
            r.codec,
            r.setting,
            r.bytes,
            num(r.bpp),
            num(r.psnr),
            num(r.ssim),
            num(r.ms_ssim),
            r.encode_ms,
            r.decode_ms
        );
    }
    s
}

/// The two rate–distortion plots of the mean curves.
pub fn plots(summary: &Summary) -> [Plot; 2] {
    let series = |metric: usize| -> Vec<Series> {
        [
            ("kiln", "Kiln", KILN_COLOR),
            (super::REFERENCE_CODEC, "Kiln, reference model", REFERENCE_COLOR),
            ("jpeg", "JPEG 4:2:0", JPEG_COLOR),
        ]
        .iter()
        .filter_map(|(k, label, color)| {
            let pts = summary.mean_curves.get(*k)?;
            let mut points: Vec<(f64, f64)> = pts.iter().map(|p| (p.1, if metric == 0 { p.2 } else { p.4 })).collect();
            points.sort_by(|a, b| a.0.total_cmp(&b.0));
            Some(Series { label: label.to_string(), color: *color, points })
        })
        .collect()
    };
    let marker = Some(("PNG lossless".to_string(), summary.png_bpp));
    [
        Plot {
            title: format!("Rate-distortion, mean of {} images", summary.images),
            x_label: "bits per pixel".into(),
            y_label: "PSNR (dB)".into(),
            series: series(0),
            marker: marker.clone(),
        },
        Plot {
            title: format!("Rate-distortion, mean of {} images", summary.images),
            x_label: "bits per pixel".into(),
            y_label: "MS-SSIM".into(),
            series: series(1),
            marker,
        },
    ]
}

fn crop(p: &Picture) -> Picture {
    let (w, h) = (CROP.min(p.width), CROP.min(p.height));
    let (x0, y0) = ((p.width - w) / 2, (p.height - h) / 2);
    let c = p.channels as usize;
    let mut data = Vec::with_capacity((w * h) as usize * c);
    for y in y0..y0 + h {
        let start = ((y * p.width + x0) as usize) * c;
        data.extend_from_slice(&p.data[start..start + w as usize * c]);
    }
    Picture { width: w, height: h, channels: p.channels, data }
}

fn safe_name(s: &str) -> String {
    s.chars().map(|c| if c.is_ascii_alphanumeric() || c == '-' || c == '_' { c } else { '_' }).collect()
}

fn write(path: &Path, bytes: &[u8]) -> Result<()> {
    write_atomic(path, bytes)
}

/// Writes every report file into `dir`.
pub fn write_report(dir: &Path, results: &[ImageResult], summary: &Summary) -> Result<()> {
    write(&dir.join("rd.csv"), rd_csv(results).as_bytes())?;
    let json = serde_json::to_string_pretty(summary).map_err(|e| KilnError::InvalidArgument(e.to_string()))?;
    write(&dir.join("summary.json"), json.as_bytes())?;
    let [p_psnr, p_ms] = plots(summary);
    let mut svgs = Vec::new();
    for (p, name) in [(&p_psnr, "rd-psnr"), (&p_ms, "rd-ms-ssim")] {
        let svg = p.to_svg();
        write(&dir.join(format!("{name}.svg")), svg.as_bytes())?;
        let img = p.to_png_image();
        let pic = Picture { width: img.width(), height: img.height(), channels: 3, data: img.into_raw() };
        write(&dir.join(format!("{name}.png")), &pic.to_png()?)?;
        svgs.push(svg);
    }
    let crops = dir.join("crops");
    std::fs::create_dir_all(&crops).map_err(|e| KilnError::io(&crops, e))?;
    let mut html = String::new();
    let _ = write!(
        html,
        "<!doctype html><html><head><meta charset=\"utf-8\"><title>Kiln evaluation</title><style>\
body{{font-family:sans-serif;margin:2em;color:#222}} table{{border-collapse:collapse}} td,th{{border:1px solid #ccc;padding:3px 8px;text-align:right}} \
.crops img{{image-rendering:pixelated;width:288px;margin-right:6px}} figure{{display:inline-block;margin:0 8px 0 0}}</style></head><body>\
<h1>Kiln rate–distortion report</h1><p>{} images, model <code>{}</code>{}. BD-rate of Kiln vs JPEG on the mean curve: <b>{}</b>; BD-PSNR: <b>{}</b>. \
Mean PNG size: {:.3} bpp.{}</p>",
        summary.images,
        summary.model,
        match summary.refine_iterations {
            0 => String::new(),
            n => format!(", encoder refinement {n} steps per tile"),
        },
        summary.bd_rate_vs_jpeg.map(|v| format!("{:+.1}%", 100.0 * v)).unwrap_or("n/a (ranges do not overlap)".into()),
        summary.bd_psnr_vs_jpeg.map(|v| format!("{v:+.2} dB")).unwrap_or("n/a".into()),
        summary.png_bpp,
        summary
            .bd_rate_vs_reference
            .map(|v| format!(" BD-rate vs the reference model: <b>{:+.1}%</b>.", 100.0 * v))
            .unwrap_or_default()
    );
    for svg in &svgs {
        html += svg;
    }
    html += "<h2>Mean curves</h2><table><tr><th>codec</th><th>setting</th><th>bpp</th><th>PSNR dB</th><th>SSIM</th><th>MS-SSIM</th></tr>";
    for (codec, pts) in &summary.mean_curves {
        for (s, b, p, ss, ms) in pts {
            let _ = write!(
                html,
                "<tr><td>{codec}</td><td>{s}</td><td>{b:.3}</td><td>{}</td><td>{ss:.4}</td><td>{ms:.4}</td></tr>",
                if p.is_finite() { format!("{p:.2}") } else { "lossless".into() }
            );
        }
    }
    html += "</table><h2>Per image</h2><table><tr><th>image</th><th>BD-rate vs JPEG</th></tr>";
    for (img, v) in &summary.bd_rate_per_image {
        let _ = write!(
            html,
            "<tr><td>{}</td><td>{}</td></tr>",
            esc(img),
            v.map(|v| format!("{:+.1}%", 100.0 * v)).unwrap_or("n/a".into())
        );
    }
    html += "</table><h2>Crops</h2><p>Centre crops, shown at 1.5×: original, Kiln at a middle quality, JPEG at the nearest bpp.</p>";
    for r in results {
        let name = safe_name(&r.rows[0].image);
        let kiln_rows: Vec<_> = r.rows.iter().filter(|x| x.codec == "kiln").collect();
        let jpeg_rows: Vec<_> = r.rows.iter().filter(|x| x.codec == "jpeg").collect();
        if kiln_rows.is_empty() || jpeg_rows.is_empty() {
            continue;
        }
        let ki = kiln_rows.len() / 2;
        let target = kiln_rows[ki].bpp;
        let ji = (0..jpeg_rows.len())
            .min_by(|&a, &b| (jpeg_rows[a].bpp - target).abs().total_cmp(&(jpeg_rows[b].bpp - target).abs()))
            .unwrap_or(0);
        let _ = write!(html, "<h3>{}</h3><div class=\"crops\">", esc(&r.rows[0].image));
        for (tag, pic, caption) in [
            ("original", &r.original, "original".to_string()),
            (
                "kiln",
                &r.kiln[ki],
                format!(
                    "Kiln q{} · {:.3} bpp · {:.2} dB",
                    kiln_rows[ki].setting, kiln_rows[ki].bpp, kiln_rows[ki].psnr
                ),
            ),
            (
                "jpeg",
                &r.jpeg[ji],
                format!(
                    "JPEG q{} · {:.3} bpp · {:.2} dB",
                    jpeg_rows[ji].setting, jpeg_rows[ji].bpp, jpeg_rows[ji].psnr
                ),
            ),
        ] {
            let file = format!("{name}-{tag}.png");
            write(&crops.join(&file), &crop(pic).to_png()?)?;
            let _ = write!(
                html,
                "<figure><img src=\"crops/{file}\" alt=\"{tag}\"><figcaption>{}</figcaption></figure>",
                esc(&caption)
            );
        }
        html += "</div>";
    }
    html += "</body></html>\n";
    write(&dir.join("report.html"), html.as_bytes())
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;")
}
