//! Plots a `kiln train --log` log: validation PSNR and bpp at qualities 1, 50 and 100 per
//! validation step, and the training loss averaged over each 1000 steps, as SVG and PNG.
//! Where the log resumes at an earlier step (a phase tried and restarted), the later lines of
//! the abandoned branch are dropped: the plot shows the history of the latest model.
//! `cargo run --release --example plot_training -- models/train-default.log docs/default-training`
//! writes `docs/default-training-{val,loss}.{svg,png}`.

use kiln::eval::plot::{Plot, Series};

const COLORS: [[u8; 3]; 3] = [[200, 60, 40], [40, 110, 190], [60, 150, 70]];

/// One quality's validation history: label, `(step, PSNR)` and `(step, bpp)`.
type Curve = (String, Vec<(f64, f64)>, Vec<(f64, f64)>);

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let [_, log, prefix] = args.as_slice() else {
        anyhow::bail!("usage: plot_training LOG OUT_PREFIX");
    };
    let text = std::fs::read_to_string(log)?;
    // "validation at step N: q1: B bpp P dB, q50: ..., q100: ..."
    let mut val: Vec<Curve> = Vec::new();
    // "step N/T  loss L  ...": (step, loss), averaged per block of 1000 steps below.
    let mut losses: Vec<(u64, f64)> = Vec::new();
    for line in text.lines() {
        // "resuming from CKPT at step S": what the log holds after step S belongs to a branch
        // that this resume abandoned (a phase tried and restarted), so the plot follows the
        // branch that led to the latest model.
        if let Some(rest) = line.strip_prefix("resuming from ") {
            let Some(step) = rest.rsplit_once(" at step ").and_then(|(_, s)| s.trim().parse::<f64>().ok()) else {
                continue;
            };
            for v in &mut val {
                v.1.retain(|p| p.0 <= step);
                v.2.retain(|p| p.0 <= step);
            }
            losses.retain(|l| l.0 as f64 <= step);
        } else if let Some(rest) = line.strip_prefix("validation at step ") {
            let Some((step, points)) = rest.split_once(": ") else { continue };
            let step: f64 = step.parse()?;
            for part in points.split(", ") {
                let f: Vec<&str> = part.split_whitespace().collect();
                if let [q, bpp, "bpp", psnr, "dB"] = f.as_slice() {
                    let q = q.trim_end_matches(':').to_string();
                    let i = match val.iter().position(|v| v.0 == q) {
                        Some(i) => i,
                        None => {
                            val.push((q, Vec::new(), Vec::new()));
                            val.len() - 1
                        }
                    };
                    val[i].1.push((step, psnr.parse()?));
                    val[i].2.push((step, bpp.parse()?));
                }
            }
        } else if let Some(rest) = line.strip_prefix("step ") {
            let f: Vec<&str> = rest.split_whitespace().collect();
            if let [step, "loss", loss, ..] = f.as_slice() {
                let step: u64 = step.split('/').next().unwrap_or("0").parse()?;
                let loss: f64 = loss.parse()?;
                if loss.is_finite() {
                    losses.push((step, loss));
                }
            }
        }
    }
    let mut blocks: std::collections::BTreeMap<u64, (f64, usize)> = Default::default();
    for (step, loss) in losses {
        let e = blocks.entry(step.div_ceil(1000) * 1000).or_default();
        e.0 += loss;
        e.1 += 1;
    }
    anyhow::ensure!(!val.is_empty() || !blocks.is_empty(), "{log}: no training or validation lines");
    let series = |pick: fn(&Curve) -> &Vec<(f64, f64)>| {
        val.iter()
            .zip(COLORS.iter().cycle())
            .map(|(v, c)| Series { label: v.0.clone(), color: *c, points: pick(v).clone() })
            .collect::<Vec<_>>()
    };
    let plots = [
        ("val-psnr", "Validation PSNR at q1, q50, q100", "PSNR (dB)", series(|v| &v.1)),
        ("val-bpp", "Validation bpp at q1, q50, q100", "bits per pixel", series(|v| &v.2)),
        (
            "loss",
            "Training loss, mean per 1000 steps",
            "loss",
            vec![Series {
                label: "loss".into(),
                color: COLORS[1],
                points: blocks
                    .iter()
                    .filter(|(s, _)| **s >= 3000)
                    .map(|(s, (sum, n))| (*s as f64, sum / *n as f64))
                    .collect(),
            }],
        ),
    ];
    for (name, title, y_label, series) in plots {
        let plot = Plot {
            title: title.into(),
            x_label: "training step".into(),
            y_label: y_label.into(),
            series,
            marker: None,
        };
        std::fs::write(format!("{prefix}-{name}.svg"), plot.to_svg()?)?;
        plot.to_png_image()?.save(format!("{prefix}-{name}.png"))?;
        println!("{prefix}-{name}.{{svg,png}}");
    }
    Ok(())
}
