//! Plots the mean Kiln curves of several `kiln evaluate` runs (bpp vs PSNR) in one figure, with
//! the first run's JPEG curve and PNG marker, as SVG and PNG: e.g. the same model with and
//! without encoder refinement.
//! `cargo run --release --example plot_rd -- docs/default-val-rd-psnr "Kiln=a/summary.json" "Kiln refined=b/summary.json"`
//! writes `docs/default-val-rd-psnr.{svg,png}`.

use kiln::eval::plot::{Plot, Series};

const COLORS: [[u8; 3]; 3] = [[200, 80, 30], [120, 160, 60], [150, 60, 160]];
const JPEG_COLOR: [u8; 3] = [40, 100, 190];

/// `(bpp, PSNR)` points of one codec's mean curve in a `summary.json`, sorted by bpp.
fn curve(summary: &serde_json::Value, codec: &str) -> anyhow::Result<Vec<(f64, f64)>> {
    let pts = summary["mean_curves"][codec].as_array().ok_or_else(|| anyhow::anyhow!("no {codec} curve"))?;
    let mut out: Vec<(f64, f64)> =
        pts.iter().map(|p| (p[1].as_f64().unwrap_or(f64::NAN), p[2].as_f64().unwrap_or(f64::NAN))).collect();
    out.sort_by(|a, b| a.0.total_cmp(&b.0));
    Ok(out)
}

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().skip(1).collect();
    let Some((stem, runs)) = args.split_first().filter(|(_, r)| !r.is_empty() && r.len() <= COLORS.len()) else {
        anyhow::bail!("usage: plot_rd OUT_STEM LABEL=summary.json... (one to three runs)");
    };
    let mut series = Vec::new();
    let mut first: Option<serde_json::Value> = None;
    for (run, color) in runs.iter().zip(COLORS) {
        let (label, path) = run.split_once('=').ok_or_else(|| anyhow::anyhow!("{run}: expected LABEL=summary.json"))?;
        let summary: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(path)?)?;
        series.push(Series { label: label.to_string(), color, points: curve(&summary, "kiln")? });
        first.get_or_insert(summary);
    }
    let first = first.expect("at least one run");
    series.push(Series { label: "JPEG 4:2:0".into(), color: JPEG_COLOR, points: curve(&first, "jpeg")? });
    let plot = Plot {
        title: format!("Rate-distortion, mean of {} images", first["images"]),
        x_label: "bits per pixel".into(),
        y_label: "PSNR (dB)".into(),
        series,
        marker: first["png_bpp"].as_f64().map(|b| ("PNG lossless".to_string(), b)),
    };
    std::fs::write(format!("{stem}.svg"), plot.to_svg()?)?;
    plot.to_png_image()?.save(format!("{stem}.png"))?;
    eprintln!("wrote {stem}.svg and {stem}.png");
    Ok(())
}
