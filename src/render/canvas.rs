//! Drawing primitives for the pictures: an RGB canvas with clipped rectangles, lines,
//! ellipse outlines, text (DejaVu Sans through plotters), axes with ticks, colour bars and
//! the phase colour wheel; plus PNG encoding.
//!
//! Geometry is in pixels, origin at the top-left corner, x to the right, y downwards (the
//! image convention of docs/conventions.md). Data cells are drawn by nearest-neighbour
//! sampling; a [`Geometry`] records where a picture's data area lies so that tests and
//! overlays can map data coordinates to pixels.
use super::colour::{complex_rgb, ramp_rgb};
use crate::error::{Error, Result};
use crate::export::OutDir;
use image::{Rgb, RgbImage};
use num_complex::Complex64;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, Pos, VPos};
use plotters::style::FontTransform;
use std::path::PathBuf;

/// Name under which the bundled font is registered with plotters.
pub const FONT: &str = "sans-serif";

pub const WHITE: [u8; 3] = [255, 255, 255];
pub const BLACK: [u8; 3] = [0, 0, 0];
pub const GREY: [u8; 3] = [110, 110, 110];

/// Register the bundled DejaVu Sans (free licence, see the `dejavu` crate) once per process.
pub fn ensure_font() {
    static ONCE: std::sync::Once = std::sync::Once::new();
    ONCE.call_once(|| {
        // A failure leaves text undrawn; the bundled font is a valid TrueType file.
        let _ = plotters::style::register_font(
            FONT,
            plotters::style::FontStyle::Normal,
            dejavu::sans::regular(),
        );
    });
}

/// Where a picture's data area lies, in pixels.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Geometry {
    /// Whole picture size.
    pub image_width: u32,
    pub image_height: u32,
    /// Data area: left and top pixel, width and height in pixels.
    pub left: u32,
    pub top: u32,
    pub width: u32,
    pub height: u32,
    /// Pixels per data cell (same along x and y).
    pub px_per_cell: f64,
    /// Centre and radius (pixels) of the colour-wheel legend, when the picture has one.
    pub wheel: Option<(f64, f64, f64)>,
}

impl Geometry {
    /// Pixel position (x, y) of a fractional data position: cell `[row, col]` spans
    /// `left + col * px_per_cell .. left + (col + 1) * px_per_cell`, so its centre is at
    /// `col + 0.5`.
    pub fn data_to_px(&self, row: f64, col: f64) -> (f64, f64) {
        (
            self.left as f64 + (col + 0.5) * self.px_per_cell,
            self.top as f64 + (row + 0.5) * self.px_per_cell,
        )
    }

    /// Data cell `[row, col]` under pixel `(x, y)`, if inside the data area.
    pub fn px_to_cell(&self, x: u32, y: u32, rows: usize, cols: usize) -> Option<(usize, usize)> {
        if x < self.left
            || y < self.top
            || x >= self.left + self.width
            || y >= self.top + self.height
        {
            return None;
        }
        let c = ((x - self.left) as f64 / self.px_per_cell) as usize;
        let r = ((y - self.top) as f64 / self.px_per_cell) as usize;
        Some((r.min(rows.saturating_sub(1)), c.min(cols.saturating_sub(1))))
    }
}

/// Pixels per cell so that `n` cells span `target` pixels (fractional: cells are sampled by
/// nearest neighbour, so a cell may cover one pixel more or less than its neighbour).
pub fn cell_scale(n: usize, target: usize) -> f64 {
    target as f64 / n.max(1) as f64
}

/// An RGB picture being drawn.
pub struct Canvas {
    pub img: RgbImage,
}

impl Canvas {
    /// A white canvas.
    pub fn new(width: u32, height: u32) -> Canvas {
        ensure_font();
        Canvas {
            img: RgbImage::from_pixel(width.max(1), height.max(1), Rgb(WHITE)),
        }
    }

    pub fn width(&self) -> u32 {
        self.img.width()
    }

    pub fn height(&self) -> u32 {
        self.img.height()
    }

    /// Set one pixel; outside the canvas nothing happens.
    pub fn put(&mut self, x: i64, y: i64, c: [u8; 3]) {
        if x >= 0 && y >= 0 && (x as u64) < self.width() as u64 && (y as u64) < self.height() as u64
        {
            self.img.put_pixel(x as u32, y as u32, Rgb(c));
        }
    }

    /// Fill the rectangle `[x0, x0 + w) x [y0, y0 + h)` (clipped).
    pub fn fill_rect(&mut self, x0: i64, y0: i64, w: i64, h: i64, c: [u8; 3]) {
        for y in y0.max(0)..(y0 + h).min(self.height() as i64) {
            for x in x0.max(0)..(x0 + w).min(self.width() as i64) {
                self.img.put_pixel(x as u32, y as u32, Rgb(c));
            }
        }
    }

    /// One-pixel outline of a rectangle.
    pub fn outline(&mut self, x0: i64, y0: i64, w: i64, h: i64, c: [u8; 3]) {
        self.fill_rect(x0 - 1, y0 - 1, w + 2, 1, c);
        self.fill_rect(x0 - 1, y0 + h, w + 2, 1, c);
        self.fill_rect(x0 - 1, y0 - 1, 1, h + 2, c);
        self.fill_rect(x0 + w, y0 - 1, 1, h + 2, c);
    }

    /// Fill the data area of `g` cell by cell from `colour(row, col)` (nearest neighbour).
    pub fn blit(
        &mut self,
        g: &Geometry,
        rows: usize,
        cols: usize,
        mut colour: impl FnMut(usize, usize) -> [u8; 3],
    ) {
        if rows == 0 || cols == 0 {
            return;
        }
        for y in g.top..g.top + g.height {
            for x in g.left..g.left + g.width {
                if let Some((r, c)) = g.px_to_cell(x, y, rows, cols) {
                    self.put(x as i64, y as i64, colour(r, c));
                }
            }
        }
    }

    /// Outline of the ellipse with centre `(cx, cy)` and semi-axes `rx`, `ry` (pixels),
    /// `width` pixels wide, clipped to the rectangle `clip = (x0, y0, w, h)`.
    #[allow(clippy::too_many_arguments)]
    pub fn ellipse(
        &mut self,
        (cx, cy): (f64, f64),
        rx: f64,
        ry: f64,
        width: f64,
        c: [u8; 3],
        clip: (u32, u32, u32, u32),
    ) {
        if !(rx > 0.0 && ry > 0.0 && cx.is_finite() && cy.is_finite()) {
            return;
        }
        let half = width / 2.0;
        let (x0, y0, w, h) = clip;
        let xa = ((cx - rx - width).floor() as i64).max(x0 as i64);
        let xb = ((cx + rx + width).ceil() as i64).min((x0 + w) as i64 - 1);
        let ya = ((cy - ry - width).floor() as i64).max(y0 as i64);
        let yb = ((cy + ry + width).ceil() as i64).min((y0 + h) as i64 - 1);
        let rmin = rx.min(ry);
        for y in ya..=yb {
            for x in xa..=xb {
                let dx = (x as f64 + 0.5 - cx) / rx;
                let dy = (y as f64 + 0.5 - cy) / ry;
                let d = (dx * dx + dy * dy).sqrt();
                if ((d - 1.0) * rmin).abs() <= half {
                    self.put(x, y, c);
                }
            }
        }
    }

    /// Draw text with its anchor point at `(x, y)`; `h`, `v` say which part of the text sits
    /// there; `vertical` turns it to read upwards.
    #[allow(clippy::too_many_arguments)]
    pub fn text(
        &mut self,
        s: &str,
        (x, y): (i64, i64),
        size: f64,
        c: [u8; 3],
        h: HPos,
        v: VPos,
        vertical: bool,
    ) {
        let (w, hgt) = self.img.dimensions();
        let area = BitMapBackend::with_buffer(&mut self.img, (w, hgt)).into_drawing_area();
        let colour = RGBColor(c[0], c[1], c[2]);
        let mut style = TextStyle::from((FONT, size).into_font())
            .color(&colour)
            .pos(Pos::new(h, v));
        if vertical {
            style = style.transform(FontTransform::Rotate270);
        }
        let _ = area.draw_text(s, &style, (x as i32, y as i32));
        let _ = area.present();
    }

    /// Frame, ticks and tick labels around a data area. `x_edges` / `y_edges` are the data
    /// values at the left/right and top/bottom edges of the area.
    pub fn axes(
        &mut self,
        g: &Geometry,
        x_edges: (f64, f64),
        y_edges: (f64, f64),
        x_label: &str,
        y_label: &str,
    ) {
        let (l, t, w, h) = (g.left as i64, g.top as i64, g.width as i64, g.height as i64);
        self.outline(l, t, w, h, BLACK);
        let to_x = |v: f64| l as f64 + (v - x_edges.0) / (x_edges.1 - x_edges.0) * w as f64;
        let to_y = |v: f64| t as f64 + (v - y_edges.0) / (y_edges.1 - y_edges.0) * h as f64;
        let (xt, xstep) = nice_ticks(x_edges.0, x_edges.1, (w / 80).clamp(2, 8) as usize);
        for v in xt {
            let px = to_x(v).round() as i64;
            self.fill_rect(px, t + h + 1, 1, 5, BLACK);
            let s = format_tick(v, xstep);
            self.text(
                &s,
                (px, t + h + 8),
                12.0,
                BLACK,
                HPos::Center,
                VPos::Top,
                false,
            );
        }
        let (yt, ystep) = nice_ticks(y_edges.0, y_edges.1, (h / 50).clamp(2, 10) as usize);
        for v in yt {
            let py = to_y(v).round() as i64;
            self.fill_rect(l - 6, py, 5, 1, BLACK);
            let s = format_tick(v, ystep);
            self.text(
                &s,
                (l - 9, py),
                12.0,
                BLACK,
                HPos::Right,
                VPos::Center,
                false,
            );
        }
        self.text(
            x_label,
            (l + w / 2, t + h + 28),
            13.0,
            BLACK,
            HPos::Center,
            VPos::Top,
            false,
        );
        self.text(
            y_label,
            (l - 52, t + h / 2),
            13.0,
            BLACK,
            HPos::Center,
            VPos::Center,
            true,
        );
    }

    /// A vertical colour bar of the ramp at `(x0, y0)`, `w` x `h` pixels, top = `hi`,
    /// bottom = `lo`, with ticks and a label.
    #[allow(clippy::too_many_arguments)]
    pub fn colour_bar(&mut self, x0: i64, y0: i64, w: i64, h: i64, lo: f64, hi: f64, label: &str) {
        for y in 0..h {
            let t = 1.0 - (y as f64 + 0.5) / h as f64;
            self.fill_rect(x0, y0 + y, w, 1, ramp_rgb(t));
        }
        self.outline(x0, y0, w, h, BLACK);
        if hi.partial_cmp(&lo) != Some(std::cmp::Ordering::Greater) {
            return;
        }
        let (ticks, step) = nice_ticks(lo, hi, 6);
        for v in ticks {
            let py = (y0 as f64 + (hi - v) / (hi - lo) * h as f64).round() as i64;
            self.fill_rect(x0 + w + 1, py, 4, 1, BLACK);
            let s = format_tick(v, step);
            self.text(
                &s,
                (x0 + w + 7, py),
                12.0,
                BLACK,
                HPos::Left,
                VPos::Center,
                false,
            );
        }
        self.text(
            label,
            (x0 + w + 52, y0 + h / 2),
            13.0,
            BLACK,
            HPos::Center,
            VPos::Center,
            true,
        );
    }

    /// The phase colour wheel: at screen angle `a` from +x towards +y (clockwise on screen,
    /// since y points down, the azimuth convention of docs/conventions.md) the hue is that
    /// of phase `a`; the radius gives the amplitude (0 at the centre, 1 at the rim). With
    /// `ring` only the outer half is drawn at full brightness (phase only).
    pub fn wheel(&mut self, (cx, cy): (f64, f64), radius: f64, ring: bool) {
        let r = radius.ceil() as i64 + 1;
        for y in (cy as i64 - r)..=(cy as i64 + r) {
            for x in (cx as i64 - r)..=(cx as i64 + r) {
                let dx = x as f64 + 0.5 - cx;
                let dy = y as f64 + 0.5 - cy;
                let d = (dx * dx + dy * dy).sqrt() / radius;
                if d > 1.0 || (ring && d < 0.5) {
                    continue;
                }
                let amp = if ring { 1.0 } else { d };
                self.put(
                    x,
                    y,
                    complex_rgb(Complex64::from_polar(amp, dy.atan2(dx)), 1.0),
                );
            }
        }
        let (cxi, cyi, ri) = (cx.round() as i64, cy.round() as i64, radius.round() as i64);
        let lbl = |c: &mut Canvas, s: &str, p: (i64, i64), h: HPos, v: VPos| {
            c.text(s, p, 12.0, BLACK, h, v, false)
        };
        lbl(self, "0", (cxi + ri + 4, cyi), HPos::Left, VPos::Center);
        lbl(self, "π/2", (cxi, cyi + ri + 3), HPos::Center, VPos::Top);
        lbl(self, "π", (cxi - ri - 4, cyi), HPos::Right, VPos::Center);
        lbl(
            self,
            "3π/2",
            (cxi, cyi - ri - 3),
            HPos::Center,
            VPos::Bottom,
        );
    }
}

/// Tick values at 1-2-2.5-5 steps covering `[min(a, b), max(a, b)]` with about `count` ticks,
/// and the step.
pub fn nice_ticks(a: f64, b: f64, count: usize) -> (Vec<f64>, f64) {
    let (lo, hi) = if a <= b { (a, b) } else { (b, a) };
    if hi.partial_cmp(&lo) != Some(std::cmp::Ordering::Greater)
        || !lo.is_finite()
        || !hi.is_finite()
    {
        return (Vec::new(), 1.0);
    }
    let raw = (hi - lo) / count.max(1) as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 2.5, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * mag);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    let ticks = (first..=last).map(|k| k as f64 * step).collect();
    (ticks, step)
}

/// A tick label with as many decimals as the step needs.
pub fn format_tick(v: f64, step: f64) -> String {
    let decimals = (0..8)
        .find(|&d| {
            let x = step * 10f64.powi(d);
            (x - x.round()).abs() < 1e-6 * x.abs().max(1.0)
        })
        .unwrap_or(8) as usize;
    let v = if v.abs() < step * 1e-9 { 0.0 } else { v };
    format!("{v:.decimals$}")
}

/// Encode a picture as PNG bytes.
pub fn encode_png(img: &RgbImage) -> Result<Vec<u8>> {
    let mut bytes = Vec::new();
    img.write_to(
        &mut std::io::Cursor::new(&mut bytes),
        image::ImageFormat::Png,
    )
    .map_err(|e| Error::Input(format!("cannot encode PNG: {e}")))?;
    Ok(bytes)
}

/// Encode a picture as PNG and write it atomically into the output folder.
pub fn write_png(out: &OutDir, name: &str, img: &RgbImage) -> Result<PathBuf> {
    let bytes = encode_png(img)?;
    out.write_bytes(name, &bytes)
}

/// A chart from a plotters drawing: draw into an RGB buffer of `w` x `h` and return it.
pub fn plotters_picture(
    w: u32,
    h: u32,
    draw: impl FnOnce(&DrawingArea<BitMapBackend<'_>, plotters::coord::Shift>) -> Option<()>,
) -> RgbImage {
    ensure_font();
    let mut img = RgbImage::from_pixel(w, h, Rgb(WHITE));
    {
        let area = BitMapBackend::with_buffer(&mut img, (w, h)).into_drawing_area();
        // A drawing error leaves the picture partly drawn; there is no user input in it.
        let _ = draw(&area);
        let _ = area.present();
    }
    img
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_step_by_one_two_two_and_a_half_five() {
        // Common practice, no source.
        let (t, s) = nice_ticks(-0.5, 0.5, 4);
        assert_eq!(s, 0.25);
        assert_eq!(t, vec![-0.5, -0.25, 0.0, 0.25, 0.5]);
        assert_eq!(format_tick(-0.25, s), "-0.25");
        let (t, s) = nice_ticks(17.0, -3.0, 4);
        assert_eq!((t.first().copied(), s), (Some(0.0), 5.0));
        assert_eq!(format_tick(15.0, s), "15");
        assert!(nice_ticks(1.0, 1.0, 4).0.is_empty());
        assert!(nice_ticks(f64::NAN, 1.0, 4).0.is_empty());
    }

    #[test]
    fn ellipse_outline_is_clipped_and_at_its_radius() {
        // Common practice, no source.
        let mut c = Canvas::new(100, 100);
        c.ellipse((50.0, 50.0), 30.0, 30.0, 2.0, BLACK, (0, 0, 100, 60));
        assert_eq!(c.img.get_pixel(80, 50).0, BLACK);
        assert_eq!(c.img.get_pixel(50, 50).0, WHITE);
        assert_eq!(c.img.get_pixel(50, 80).0, WHITE, "clipped below y = 60");
    }
}
