//! Writing the evaluation report: `rd.csv`, `summary.json`, plots (SVG and PNG), crops and
//! `report.html`.

use std::fmt::Write as _;
use std::path::Path;

use super::plot::{PALETTE, Plot, Series};
use super::{ImageResult, Row, Summary};
use crate::error::{KilnError, Result};
use crate::image_io::{Picture, write_atomic};

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

/// Legend label and colour of a codec's curve (Kiln in black, the rest from the colour-blind-safe
/// palette in a fixed order, so a codec keeps its colour from report to report).
fn style(codec: &str) -> (String, [u8; 3]) {
    let lossy = ["jpeg", "jpeg2000", "webp", "avif", "jpegxl"];
    match codec {
        "kiln" => ("Kiln".into(), PALETTE[0]),
        super::REFERENCE_CODEC => ("Kiln, reference model".into(), PALETTE[6]),
        _ => {
            let label = super::baselines::Baseline::built()
                .into_iter()
                .find(|b| b.name() == codec)
                .map_or(codec.to_string(), |b| b.label().to_string());
            let i = lossy.iter().position(|c| *c == codec).unwrap_or(lossy.len());
            (label, PALETTE[1 + i.min(PALETTE.len() - 2)])
        }
    }
}

/// The codecs with curves (Kiln first), in the order of `codecs`.
fn curve_codecs<'a>(
    codecs: impl Iterator<Item = &'a String>,
    lossless: &std::collections::BTreeMap<String, f64>,
) -> Vec<String> {
    let mut out: Vec<String> = codecs.filter(|c| !lossless.contains_key(*c)).cloned().collect();
    out.sort_by_key(|c| (c != "kiln", c != super::REFERENCE_CODEC, c.clone()));
    out
}

/// The two rate–distortion plots of the mean curves (PSNR and MS-SSIM against bpp).
pub fn plots(summary: &Summary) -> [Plot; 2] {
    let codecs = curve_codecs(summary.mean_curves.keys(), &summary.lossless_bpp);
    let series = |metric: usize| -> Vec<Series> {
        codecs
            .iter()
            .filter_map(|k| {
                let pts = summary.mean_curves.get(k)?;
                let mut points: Vec<(f64, f64)> =
                    pts.iter().map(|p| (p.1, if metric == 0 { p.2 } else { p.4 })).collect();
                points.sort_by(|a, b| a.0.total_cmp(&b.0));
                let (label, color) = style(k);
                Some(Series { label, color, points })
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

/// The PSNR plot of one image's curves.
pub fn image_plot(rows: &[Row], lossless: &std::collections::BTreeMap<String, f64>) -> Plot {
    let mut names: Vec<String> = Vec::new();
    for r in rows {
        if !names.contains(&r.codec) {
            names.push(r.codec.clone());
        }
    }
    let series = curve_codecs(names.iter(), lossless)
        .into_iter()
        .map(|k| {
            let mut points: Vec<(f64, f64)> = rows.iter().filter(|r| r.codec == k).map(|r| (r.bpp, r.psnr)).collect();
            points.sort_by(|a, b| a.0.total_cmp(&b.0));
            let (label, color) = style(&k);
            Series { label, color, points }
        })
        .collect();
    let png = rows.iter().find(|r| r.codec == "png").map(|r| r.bpp);
    Plot {
        title: format!("Rate-distortion, {}", rows.first().map_or("", |r| r.image.as_str())),
        x_label: "bits per pixel".into(),
        y_label: "PSNR (dB)".into(),
        series,
        marker: png.map(|b| ("PNG lossless".to_string(), b)),
    }
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
        let svg = p.to_svg()?;
        write(&dir.join(format!("{name}.svg")), svg.as_bytes())?;
        let img = p.to_png_image()?;
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
    html += "<h2>Verdict</h2><ul>";
    for v in &summary.verdicts {
        let _ = write!(html, "<li>{}</li>", esc(v));
    }
    html += "</ul><p>BD-rate: the average difference in bits at equal PSNR over the quality range both \
        curves share (VCEG-M33), per image, then averaged over the images.</p>";
    if !summary.not_built.is_empty() {
        html += "<p>Not compared by this build: ";
        let names: Vec<String> = summary.not_built.iter().map(|(n, w)| format!("{} ({})", esc(n), esc(w))).collect();
        html += &names.join("; ");
        html += ".</p>";
    }
    for svg in &svgs {
        html += svg;
    }
    if !summary.lossless_bpp.is_empty() {
        html += "<h2>Lossless</h2><table><tr><th>image</th>";
        for c in summary.lossless_bpp.keys() {
            let _ = write!(html, "<th>{} bpp</th>", esc(c));
        }
        html += "</tr>";
        for (img, row) in &summary.lossless_per_image {
            let _ = write!(html, "<tr><td>{}</td>", esc(img));
            for c in summary.lossless_bpp.keys() {
                let _ = write!(html, "<td>{}</td>", row.get(c).map_or("".into(), |b| format!("{b:.3}")));
            }
            html += "</tr>";
        }
        html += "<tr><th>mean</th>";
        for b in summary.lossless_bpp.values() {
            let _ = write!(html, "<th>{b:.3}</th>");
        }
        html += "</tr></table>";
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
    html += "</table><h2>Per image</h2><p>BD-rate of Kiln against each codec (negative: Kiln needs fewer bits).</p><table><tr><th>image</th>";
    for b in summary.bd_rate_per_image_vs.keys() {
        let _ = write!(html, "<th>vs {}</th>", esc(b));
    }
    html += "</tr>";
    for (i, (img, _)) in summary.bd_rate_per_image.iter().enumerate() {
        let _ = write!(html, "<tr><td>{}</td>", esc(img));
        for per in summary.bd_rate_per_image_vs.values() {
            let v = per.get(i).and_then(|p| p.1);
            let _ = write!(html, "<td>{}</td>", v.map(|v| format!("{:+.1}%", 100.0 * v)).unwrap_or("n/a".into()));
        }
        html += "</tr>";
    }
    html += "</table><h2>Per-image curves</h2>";
    let plots_dir = dir.join("plots");
    std::fs::create_dir_all(&plots_dir).map_err(|e| KilnError::io(&plots_dir, e))?;
    for r in results {
        let plot = image_plot(&r.rows, &summary.lossless_bpp);
        let file = format!("{}-rd-psnr.svg", safe_name(&r.rows[0].image));
        write(&plots_dir.join(&file), plot.to_svg()?.as_bytes())?;
        let _ = write!(html, "<img src=\"plots/{file}\" alt=\"{}\" width=\"540\">", esc(&r.rows[0].image));
    }
    html += "<h2>Crops</h2><p>Centre crops, shown at 1.5×: original, Kiln at a middle quality, JPEG at the nearest bpp.</p>";
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
