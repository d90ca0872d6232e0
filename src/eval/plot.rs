//! Rate–distortion plots, drawn with plotters: SVG (vector, for the HTML report) and PNG
//! (raster; its text uses DejaVu Sans Mono, embedded, so no system fonts are needed).

use std::sync::Once;

use image::RgbImage;

use crate::error::{KilnError, Result};
use plotters::prelude::*;
use plotters::style::FontStyle;

/// One curve.
#[derive(Debug, Clone)]
pub struct Series {
    /// Legend label.
    pub label: String,
    /// RGB colour.
    pub color: [u8; 3],
    /// `(x, y)` points in drawing order.
    pub points: Vec<(f64, f64)>,
}

/// A plot: curves plus an optional vertical marker (e.g. the PNG baseline's bpp).
#[derive(Debug, Clone)]
pub struct Plot {
    /// Title.
    pub title: String,
    /// X-axis label.
    pub x_label: String,
    /// Y-axis label.
    pub y_label: String,
    /// Curves.
    pub series: Vec<Series>,
    /// A labelled marker at this x (named at the right edge when off-scale).
    pub marker: Option<(String, f64)>,
}

/// The colour-blind-safe palette of Okabe and Ito (2008), in the order curves take it
/// (common practice for categorical plots).
pub const PALETTE: [[u8; 3]; 8] = [
    [0, 0, 0],
    [230, 159, 0],
    [86, 180, 233],
    [0, 158, 115],
    [0, 114, 178],
    [213, 94, 0],
    [204, 121, 167],
    [240, 228, 66],
];

const SIZE: (u32, u32) = (720, 460);
const FONT: &str = "sans-serif";
static FONT_BYTES: &[u8] = include_bytes!("../../assets/fonts/DejaVuSansMono.ttf");
static REGISTER: Once = Once::new();

fn register_font() {
    REGISTER.call_once(|| {
        // The embedded font is a valid TrueType file, so registration cannot fail.
        let _ = plotters::style::register_font(FONT, FontStyle::Normal, FONT_BYTES);
    });
}

impl Plot {
    /// `((x0, x1), (y0, y1))`: from 0 bpp to a little past the largest x; the y range of the
    /// finite points, padded by 5%.
    fn ranges(&self) -> ((f64, f64), (f64, f64)) {
        let pts = self.series.iter().flat_map(|s| &s.points).filter(|p| p.0.is_finite() && p.1.is_finite());
        let (mut x1, mut y0, mut y1) = (0.0f64, f64::INFINITY, f64::NEG_INFINITY);
        for &(x, y) in pts {
            x1 = x1.max(x);
            y0 = y0.min(y);
            y1 = y1.max(y);
        }
        if !y0.is_finite() {
            (y0, y1) = (0.0, 1.0);
        }
        let pad = (y1 - y0).max(1e-3) * 0.05;
        ((0.0, (x1 * 1.05).max(1e-3)), (y0 - pad, y1 + pad))
    }

    fn draw<DB: DrawingBackend>(&self, root: DrawingArea<DB, plotters::coord::Shift>) -> std::result::Result<(), String>
    where
        DB::ErrorType: 'static,
    {
        let e = |e: DrawingAreaErrorKind<DB::ErrorType>| e.to_string();
        root.fill(&WHITE).map_err(e)?;
        let ((x0, x1), (y0, y1)) = self.ranges();
        let mut chart = ChartBuilder::on(&root)
            .caption(&self.title, (FONT, 18))
            .margin(12)
            .x_label_area_size(42)
            .y_label_area_size(58)
            .build_cartesian_2d(x0..x1, y0..y1)
            .map_err(e)?;
        chart
            .configure_mesh()
            .x_desc(&self.x_label)
            .y_desc(&self.y_label)
            .label_style((FONT, 13))
            .axis_desc_style((FONT, 14))
            .light_line_style(RGBColor(240, 240, 240))
            .bold_line_style(RGBColor(215, 215, 215))
            .draw()
            .map_err(e)?;
        for s in &self.series {
            let color = RGBColor(s.color[0], s.color[1], s.color[2]);
            let pts: Vec<(f64, f64)> =
                s.points.iter().copied().filter(|p| p.0.is_finite() && p.1.is_finite()).collect();
            chart
                .draw_series(LineSeries::new(pts.clone(), color.stroke_width(2)))
                .map_err(e)?
                .label(&s.label)
                .legend(move |(x, y)| PathElement::new(vec![(x, y), (x + 18, y)], color.stroke_width(2)));
            chart.draw_series(pts.iter().map(|&p| Circle::new(p, 3, color.filled()))).map_err(e)?;
        }
        if let Some((label, x)) = &self.marker {
            let grey = RGBColor(110, 110, 110);
            if x.is_finite() && *x <= x1 {
                chart.draw_series(LineSeries::new(vec![(*x, y0), (*x, y1)], grey.stroke_width(1))).map_err(e)?;
                chart
                    .draw_series(std::iter::once(Text::new(
                        format!("{label} {x:.2} bpp"),
                        (*x, y0 + 0.04 * (y1 - y0)),
                        (FONT, 12).into_font().color(&grey),
                    )))
                    .map_err(e)?;
            } else if x.is_finite() {
                chart
                    .draw_series(std::iter::once(Text::new(
                        format!("{label}: {x:.2} bpp, off scale →"),
                        (x0 + 0.5 * (x1 - x0), y1 - 0.02 * (y1 - y0)),
                        (FONT, 12).into_font().color(&grey),
                    )))
                    .map_err(e)?;
            }
        }
        chart
            .configure_series_labels()
            .position(SeriesLabelPosition::LowerRight)
            .label_font((FONT, 13))
            .background_style(WHITE.mix(0.9))
            .border_style(RGBColor(180, 180, 180))
            .draw()
            .map_err(e)?;
        root.present().map_err(e)
    }

    /// The plot as an SVG document.
    ///
    /// # Errors
    /// [`KilnError::InvalidArgument`] if plotters cannot lay the plot out.
    pub fn to_svg(&self) -> Result<String> {
        register_font();
        let mut s = String::new();
        {
            let root = SVGBackend::with_string(&mut s, SIZE).into_drawing_area();
            self.draw(root).map_err(plot_error)?;
        }
        Ok(s)
    }

    /// The plot as an RGB raster.
    ///
    /// # Errors
    /// As [`Plot::to_svg`].
    pub fn to_png_image(&self) -> Result<RgbImage> {
        register_font();
        let mut buf = vec![255u8; (SIZE.0 * SIZE.1 * 3) as usize];
        {
            let root = BitMapBackend::with_buffer(&mut buf, SIZE).into_drawing_area();
            self.draw(root).map_err(plot_error)?;
        }
        Ok(RgbImage::from_raw(SIZE.0, SIZE.1, buf).expect("buffer of the plot's size"))
    }
}

fn plot_error(m: String) -> KilnError {
    KilnError::InvalidArgument(format!("cannot draw the plot: {m}"))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn plot() -> Plot {
        Plot {
            title: "Rate-distortion".into(),
            x_label: "bits per pixel".into(),
            y_label: "PSNR (dB)".into(),
            series: vec![
                Series { label: "Kiln".into(), color: PALETTE[0], points: vec![(0.2, 30.0), (0.5, 34.0), (1.0, 38.0)] },
                Series { label: "JPEG".into(), color: PALETTE[1], points: vec![(0.3, 28.0), (0.8, 33.0), (1.6, 37.0)] },
            ],
            marker: Some(("PNG lossless".into(), 12.0)),
        }
    }

    #[test]
    fn svg_names_every_curve_and_axis() {
        let svg = plot().to_svg().unwrap();
        for s in ["<svg", "Kiln", "JPEG", "bits per pixel", "PSNR (dB)", "off scale"] {
            assert!(svg.contains(s), "missing {s}");
        }
    }

    #[test]
    fn png_draws_curves_in_their_colours_and_text() {
        let img = plot().to_png_image().unwrap();
        assert_eq!(img.dimensions(), SIZE);
        let count = |c: [u8; 3]| img.pixels().filter(|p| p.0 == c).count();
        assert!(count(PALETTE[1]) > 100, "the JPEG curve is missing");
        // Text is anti-aliased grey-to-black: many pixels neither white nor a curve colour.
        let other = img.pixels().filter(|p| p.0 != [255, 255, 255] && p.0 != PALETTE[1] && p.0 != PALETTE[0]).count();
        assert!(other > 1000, "no text or grid drawn ({other} pixels)");
    }
}
