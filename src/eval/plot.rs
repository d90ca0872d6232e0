//! Rate–distortion plots as SVG (vector, for the HTML report) and PNG (raster, drawn here with a
//! built-in 5×7 bitmap font so no font files are needed).

use image::{Rgb, RgbImage};

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

/// A plot: curves plus an optional vertical marker (the PNG baseline's bpp).
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
    /// A labelled marker at this x (drawn at the right edge with an arrow when off-scale).
    pub marker: Option<(String, f64)>,
}

const W: f64 = 640.0;
const H: f64 = 420.0;
const LEFT: f64 = 70.0;
const RIGHT: f64 = 20.0;
const TOP: f64 = 52.0;
const BOTTOM: f64 = 55.0;

fn nice_ticks(lo: f64, hi: f64) -> Vec<f64> {
    let span = (hi - lo).max(1e-9);
    let raw = span / 6.0;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0].iter().map(|m| m * mag).find(|s| *s >= raw).unwrap_or(10.0 * mag);
    let mut t = (lo / step).ceil() * step;
    let mut out = vec![];
    while t <= hi + 1e-9 {
        out.push(t);
        t += step;
    }
    out
}

fn fmt_tick(v: f64) -> String {
    let s = format!("{v:.3}");
    s.trim_end_matches('0').trim_end_matches('.').to_string()
}

impl Plot {
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

    /// Left edge of the legend's labels: far enough left for the longest (`width` measures one).
    fn legend_x(&self, width: impl Fn(&str) -> f64) -> f64 {
        let widest = self.series.iter().map(|s| width(&s.label)).fold(114.0, f64::max);
        W - RIGHT - 6.0 - widest
    }

    fn mapper(&self) -> impl Fn(f64, f64) -> (f64, f64) {
        let ((x0, x1), (y0, y1)) = self.ranges();
        move |x, y| {
            (LEFT + (x - x0) / (x1 - x0) * (W - LEFT - RIGHT), H - BOTTOM - (y - y0) / (y1 - y0) * (H - TOP - BOTTOM))
        }
    }

    /// The plot as an SVG document.
    pub fn to_svg(&self) -> String {
        let ((x0, x1), (y0, y1)) = self.ranges();
        let m = self.mapper();
        let mut s = format!(
            "<svg xmlns=\"http://www.w3.org/2000/svg\" width=\"{W}\" height=\"{H}\" viewBox=\"0 0 {W} {H}\" font-family=\"sans-serif\" font-size=\"12\">\n<rect width=\"100%\" height=\"100%\" fill=\"white\"/>\n"
        );
        s += &format!(
            "<text x=\"{}\" y=\"22\" text-anchor=\"middle\" font-size=\"15\">{}</text>\n",
            W / 2.0,
            esc(&self.title)
        );
        for t in nice_ticks(x0, x1) {
            let (px, _) = m(t, y0);
            s += &format!(
                "<line x1=\"{px:.1}\" y1=\"{TOP}\" x2=\"{px:.1}\" y2=\"{}\" stroke=\"#e4e4e4\"/>\n",
                H - BOTTOM
            );
            s += &format!(
                "<text x=\"{px:.1}\" y=\"{}\" text-anchor=\"middle\">{}</text>\n",
                H - BOTTOM + 16.0,
                fmt_tick(t)
            );
        }
        for t in nice_ticks(y0, y1) {
            let (_, py) = m(x0, t);
            s += &format!(
                "<line x1=\"{LEFT}\" y1=\"{py:.1}\" x2=\"{}\" y2=\"{py:.1}\" stroke=\"#e4e4e4\"/>\n",
                W - RIGHT
            );
            s += &format!(
                "<text x=\"{}\" y=\"{:.1}\" text-anchor=\"end\">{}</text>\n",
                LEFT - 6.0,
                py + 4.0,
                fmt_tick(t)
            );
        }
        s += &format!(
            "<rect x=\"{LEFT}\" y=\"{TOP}\" width=\"{}\" height=\"{}\" fill=\"none\" stroke=\"#333\"/>\n",
            W - LEFT - RIGHT,
            H - TOP - BOTTOM
        );
        s += &format!(
            "<text x=\"{}\" y=\"{}\" text-anchor=\"middle\">{}</text>\n",
            (LEFT + W - RIGHT) / 2.0,
            H - 14.0,
            esc(&self.x_label)
        );
        s += &format!(
            "<text x=\"16\" y=\"{0}\" text-anchor=\"middle\" transform=\"rotate(-90 16 {0})\">{1}</text>\n",
            (TOP + H - BOTTOM) / 2.0,
            esc(&self.y_label)
        );
        for (i, ser) in self.series.iter().enumerate() {
            let c = format!("rgb({},{},{})", ser.color[0], ser.color[1], ser.color[2]);
            let pts: Vec<String> = ser
                .points
                .iter()
                .filter(|p| p.0.is_finite() && p.1.is_finite())
                .map(|&(x, y)| {
                    let (a, b) = m(x, y);
                    format!("{a:.1},{b:.1}")
                })
                .collect();
            s += &format!("<polyline points=\"{}\" fill=\"none\" stroke=\"{c}\" stroke-width=\"2\"/>\n", pts.join(" "));
            for p in &pts {
                let (a, b) = p.split_once(',').unwrap_or(("0", "0"));
                s += &format!("<circle cx=\"{a}\" cy=\"{b}\" r=\"3\" fill=\"{c}\"/>\n");
            }
            let ly = legend_y(i, self.series.len());
            // About 7 px per character at font-size 12.
            let lx = self.legend_x(|t| 7.0 * t.chars().count() as f64);
            s += &format!(
                "<line x1=\"{0}\" y1=\"{ly}\" x2=\"{1}\" y2=\"{ly}\" stroke=\"{c}\" stroke-width=\"3\"/>\n",
                lx - 30.0,
                lx - 6.0
            );
            s += &format!("<text x=\"{lx}\" y=\"{}\">{}</text>\n", ly + 4.0, esc(&ser.label));
        }
        if let Some((label, x)) = &self.marker {
            let text = format!("{label}: {x:.2} bpp");
            if *x <= x1 {
                let (px, _) = m(*x, y0);
                s += &format!(
                    "<line x1=\"{px:.1}\" y1=\"{TOP}\" x2=\"{px:.1}\" y2=\"{}\" stroke=\"#777\" stroke-dasharray=\"4 3\"/>\n",
                    H - BOTTOM
                );
            }
            s += &format!(
                "<text x=\"{}\" y=\"{}\" text-anchor=\"end\" fill=\"#555\">{} →</text>\n",
                W - RIGHT - 6.0,
                H - BOTTOM - 8.0,
                esc(&text)
            );
        }
        s + "</svg>\n"
    }

    /// The plot as a raster image.
    pub fn to_png_image(&self) -> RgbImage {
        let ((x0, x1), (y0, y1)) = self.ranges();
        let m = self.mapper();
        let mut img = RgbImage::from_pixel(W as u32, H as u32, Rgb([255, 255, 255]));
        let grey = [228, 228, 228];
        let dark = [51, 51, 51];
        for t in nice_ticks(x0, x1) {
            let (px, _) = m(t, y0);
            line(&mut img, (px, TOP), (px, H - BOTTOM), grey, 1);
            let label = fmt_tick(t);
            text(&mut img, px - text_width(&label) as f64 / 2.0, H - BOTTOM + 8.0, &label, dark);
        }
        for t in nice_ticks(y0, y1) {
            let (_, py) = m(x0, t);
            line(&mut img, (LEFT, py), (W - RIGHT, py), grey, 1);
            let label = fmt_tick(t);
            text(&mut img, LEFT - 6.0 - text_width(&label) as f64, py - 7.0, &label, dark);
        }
        for (a, b) in [
            ((LEFT, TOP), (W - RIGHT, TOP)),
            ((W - RIGHT, TOP), (W - RIGHT, H - BOTTOM)),
            ((LEFT, H - BOTTOM), (W - RIGHT, H - BOTTOM)),
            ((LEFT, TOP), (LEFT, H - BOTTOM)),
        ] {
            line(&mut img, a, b, dark, 1);
        }
        text(&mut img, W / 2.0 - text_width(&self.title) as f64 / 2.0, 6.0, &self.title, dark);
        text(
            &mut img,
            (LEFT + W - RIGHT) / 2.0 - text_width(&self.x_label) as f64 / 2.0,
            H - 24.0,
            &self.x_label,
            dark,
        );
        text(&mut img, 4.0, TOP - 26.0, &self.y_label, dark);
        for (i, ser) in self.series.iter().enumerate() {
            let pts: Vec<(f64, f64)> =
                ser.points.iter().filter(|p| p.0.is_finite() && p.1.is_finite()).map(|&(x, y)| m(x, y)).collect();
            for w in pts.windows(2) {
                line(&mut img, w[0], w[1], ser.color, 2);
            }
            for &p in &pts {
                disc(&mut img, p, 3.0, ser.color);
            }
            let ly = legend_y(i, self.series.len());
            let lx = self.legend_x(|t| text_width(t) as f64);
            line(&mut img, (lx - 30.0, ly), (lx - 6.0, ly), ser.color, 3);
            text(&mut img, lx, ly - 7.0, &ser.label, dark);
        }
        if let Some((label, x)) = &self.marker {
            if *x <= x1 {
                let (px, _) = m(*x, y0);
                line(&mut img, (px, TOP), (px, H - BOTTOM), [119, 119, 119], 1);
            }
            let t = format!("{label}: {x:.2} bpp ->");
            text(&mut img, W - RIGHT - 6.0 - text_width(&t) as f64, H - BOTTOM - 22.0, &t, [85, 85, 85]);
        }
        img
    }
}

/// Legend rows sit in the lower right, above the marker note, where RD curves rarely go.
fn legend_y(i: usize, n: usize) -> f64 {
    H - BOTTOM - 44.0 - 18.0 * (n - 1 - i) as f64
}

fn esc(s: &str) -> String {
    s.replace('&', "&amp;").replace('<', "&lt;").replace('>', "&gt;")
}

fn put(img: &mut RgbImage, x: i64, y: i64, c: [u8; 3]) {
    if x >= 0 && y >= 0 && (x as u32) < img.width() && (y as u32) < img.height() {
        img.put_pixel(x as u32, y as u32, Rgb(c));
    }
}

fn line(img: &mut RgbImage, a: (f64, f64), b: (f64, f64), c: [u8; 3], width: i64) {
    let n = ((b.0 - a.0).abs().max((b.1 - a.1).abs()).ceil() as i64).max(1);
    for i in 0..=n {
        let t = i as f64 / n as f64;
        let (x, y) = ((a.0 + t * (b.0 - a.0)).round() as i64, (a.1 + t * (b.1 - a.1)).round() as i64);
        for dx in 0..width {
            for dy in 0..width {
                put(img, x + dx - width / 2, y + dy - width / 2, c);
            }
        }
    }
}

fn disc(img: &mut RgbImage, p: (f64, f64), r: f64, c: [u8; 3]) {
    let ri = r.ceil() as i64;
    for dy in -ri..=ri {
        for dx in -ri..=ri {
            if (dx * dx + dy * dy) as f64 <= r * r {
                put(img, p.0.round() as i64 + dx, p.1.round() as i64 + dy, c);
            }
        }
    }
}

/// 5×7 glyphs, one byte per row (low five bits, leftmost pixel = bit 4).
fn glyph(ch: char) -> [u8; 7] {
    match ch {
        '0' => [14, 17, 19, 21, 25, 17, 14],
        '1' => [4, 12, 4, 4, 4, 4, 14],
        '2' => [14, 17, 1, 2, 4, 8, 31],
        '3' => [31, 2, 4, 2, 1, 17, 14],
        '4' => [2, 6, 10, 18, 31, 2, 2],
        '5' => [31, 16, 30, 1, 1, 17, 14],
        '6' => [6, 8, 16, 30, 17, 17, 14],
        '7' => [31, 1, 2, 4, 8, 8, 8],
        '8' => [14, 17, 17, 14, 17, 17, 14],
        '9' => [14, 17, 17, 15, 1, 2, 12],
        '.' => [0, 0, 0, 0, 0, 12, 12],
        ',' => [0, 0, 0, 0, 12, 4, 8],
        ':' => [0, 12, 12, 0, 12, 12, 0],
        '-' => [0, 0, 0, 31, 0, 0, 0],
        '>' => [16, 8, 4, 2, 4, 8, 16],
        '(' => [2, 4, 8, 8, 8, 4, 2],
        ')' => [8, 4, 2, 2, 2, 4, 8],
        '%' => [24, 25, 2, 4, 8, 19, 3],
        '/' => [0, 1, 2, 4, 8, 16, 0],
        'A' => [14, 17, 17, 31, 17, 17, 17],
        'B' => [30, 17, 17, 30, 17, 17, 30],
        'C' => [14, 17, 16, 16, 16, 17, 14],
        'D' => [28, 18, 17, 17, 17, 18, 28],
        'E' => [31, 16, 16, 30, 16, 16, 31],
        'G' => [14, 17, 16, 23, 17, 17, 15],
        'I' => [14, 4, 4, 4, 4, 4, 14],
        'J' => [7, 2, 2, 2, 2, 18, 12],
        'K' => [17, 18, 20, 24, 20, 18, 17],
        'L' => [16, 16, 16, 16, 16, 16, 31],
        'M' => [17, 27, 21, 21, 17, 17, 17],
        'N' => [17, 17, 25, 21, 19, 17, 17],
        'P' => [30, 17, 17, 30, 16, 16, 16],
        'R' => [30, 17, 17, 30, 20, 18, 17],
        'S' => [15, 16, 16, 14, 1, 1, 30],
        'T' => [31, 4, 4, 4, 4, 4, 4],
        'F' => [31, 16, 16, 30, 16, 16, 16],
        'H' => [17, 17, 17, 31, 17, 17, 17],
        'O' => [14, 17, 17, 17, 17, 17, 14],
        'Q' => [14, 17, 17, 17, 21, 18, 13],
        'U' => [17, 17, 17, 17, 17, 17, 14],
        'V' => [17, 17, 17, 17, 17, 10, 4],
        'W' => [17, 17, 17, 21, 21, 21, 10],
        'X' => [17, 17, 10, 4, 10, 17, 17],
        'Y' => [17, 17, 10, 4, 4, 4, 4],
        'Z' => [31, 1, 2, 4, 8, 16, 31],
        '+' => [0, 4, 4, 31, 4, 4, 0],
        '*' => [0, 4, 21, 14, 21, 4, 0],
        '=' => [0, 0, 31, 0, 31, 0, 0],
        '<' => [1, 2, 4, 8, 4, 2, 1],
        'a' => [0, 0, 14, 1, 15, 17, 15],
        'b' => [16, 16, 22, 25, 17, 17, 30],
        'c' => [0, 0, 14, 16, 16, 17, 14],
        'd' => [1, 1, 13, 19, 17, 17, 15],
        'e' => [0, 0, 14, 17, 31, 16, 14],
        'f' => [6, 9, 8, 28, 8, 8, 8],
        'g' => [0, 15, 17, 17, 15, 1, 14],
        'h' => [16, 16, 22, 25, 17, 17, 17],
        'i' => [4, 0, 12, 4, 4, 4, 14],
        'j' => [2, 0, 6, 2, 2, 18, 12],
        'k' => [16, 16, 18, 20, 24, 20, 18],
        'l' => [12, 4, 4, 4, 4, 4, 14],
        'm' => [0, 0, 26, 21, 21, 17, 17],
        'n' => [0, 0, 22, 25, 17, 17, 17],
        'o' => [0, 0, 14, 17, 17, 17, 14],
        'p' => [0, 0, 30, 17, 30, 16, 16],
        'q' => [0, 0, 13, 19, 15, 1, 1],
        'r' => [0, 0, 22, 25, 16, 16, 16],
        's' => [0, 0, 14, 16, 14, 1, 30],
        't' => [8, 8, 28, 8, 8, 9, 6],
        'u' => [0, 0, 17, 17, 17, 19, 13],
        'v' => [0, 0, 17, 17, 17, 10, 4],
        'w' => [0, 0, 17, 17, 21, 21, 10],
        'x' => [0, 0, 17, 10, 4, 10, 17],
        'y' => [0, 0, 17, 17, 15, 1, 14],
        'z' => [0, 0, 31, 2, 4, 8, 31],
        _ => [0; 7],
    }
}

const SCALE: i64 = 2;

fn text_width(s: &str) -> i64 {
    s.chars().count() as i64 * 6 * SCALE
}

fn text(img: &mut RgbImage, x: f64, y: f64, s: &str, c: [u8; 3]) {
    let (x, y) = (x.round() as i64, y.round() as i64);
    for (i, ch) in s.chars().enumerate() {
        let g = glyph(ch);
        for (row, bits) in g.iter().enumerate() {
            for col in 0..5 {
                if bits & (1 << (4 - col)) != 0 {
                    for dy in 0..SCALE {
                        for dx in 0..SCALE {
                            put(img, x + (i as i64 * 6 + col) * SCALE + dx, y + row as i64 * SCALE + dy, c);
                        }
                    }
                }
            }
        }
    }
}
