//! The Fourier plane of a hologram frame: the log-magnitude spectrum (DC at the centre),
//! the signal window and the DC exclusion drawn as circles, axes in cycles per pixel.
//!
//! Frequencies follow docs/conventions.md: the shifted spectrum's bin `[row, col]` holds
//! `fx = (col - nx / 2) / nx`, `fy = (row - ny / 2) / ny` cycles per camera pixel (integer
//! division, DC at `[ny / 2, nx / 2]`), fx to the right, fy downwards. A circle of radius
//! `r` cycles/px spans `r * nx` bins along x and `r * ny` bins along y.
use super::canvas::{cell_scale, Canvas, Geometry, BLACK};
use super::colour::ramp_rgb;
use image::RgbImage;
use ndarray::Array2;
use plotters::style::text_anchor::{HPos, VPos};

/// Outline colour of the signal window (never produced by the ramp).
pub const WINDOW_RGB: [u8; 3] = [255, 0, 255];
/// Outline colour of the DC exclusion (never produced by the ramp).
pub const DC_RGB: [u8; 3] = [0, 255, 255];
/// Outline width in pixels.
pub const CIRCLE_WIDTH_PX: f64 = 2.0;

const PLOT_PX: usize = 480;
const LEFT: u32 = 78;
const TOP: u32 = 40;
const BOTTOM: u32 = 56;
const LEGEND_W: u32 = 210;

/// Layout of [`fourier_picture`] for a spectrum of `ny` x `nx` bins.
pub fn fourier_geometry(ny: usize, nx: usize) -> Geometry {
    let s = cell_scale(ny.max(nx), PLOT_PX);
    let width = ((nx.max(1) as f64 * s).round() as u32).max(1);
    let height = ((ny.max(1) as f64 * s).round() as u32).max(1);
    Geometry {
        image_width: LEFT + width + LEGEND_W,
        image_height: TOP + height.max(300) + BOTTOM,
        left: LEFT,
        top: TOP,
        width,
        height,
        px_per_cell: s,
        wheel: None,
    }
}

/// Pixel centre `(x, y)` of frequency `[fx, fy]` (cycles/px) in [`fourier_picture`].
pub fn frequency_to_px(g: &Geometry, ny: usize, nx: usize, f: [f64; 2]) -> (f64, f64) {
    let col = (nx / 2) as f64 + f[0] * nx as f64;
    let row = (ny / 2) as f64 + f[1] * ny as f64;
    g.data_to_px(row, col)
}

/// The log-magnitude spectrum on the ramp (its finite minimum to maximum), the window
/// circle (radius `window_radius_cycles_per_px` around the carrier) and the DC exclusion
/// circle (around DC) drawn on it, axes in cycles per pixel, a colour bar.
pub fn fourier_picture(
    log_magnitude: &Array2<f64>,
    carrier_cycles_per_px: [f64; 2],
    window_radius_cycles_per_px: f64,
    dc_exclusion_cycles_per_px: f64,
) -> RgbImage {
    let (ny, nx) = log_magnitude.dim();
    let g = fourier_geometry(ny, nx);
    let mut c = Canvas::new(g.image_width, g.image_height);
    let (lo, hi) = log_magnitude
        .iter()
        .filter(|v| v.is_finite())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
            (a.min(v), b.max(v))
        });
    let span = if hi > lo { hi - lo } else { 1.0 };
    c.blit(&g, ny, nx, |r, col| {
        let v = log_magnitude[[r, col]];
        ramp_rgb(if v.is_finite() { (v - lo) / span } else { 0.0 })
    });
    let clip = (g.left, g.top, g.width, g.height);
    let sx = nx as f64 * g.px_per_cell;
    let sy = ny as f64 * g.px_per_cell;
    let dc = frequency_to_px(&g, ny, nx, [0.0, 0.0]);
    let r = dc_exclusion_cycles_per_px;
    c.ellipse(dc, r * sx, r * sy, CIRCLE_WIDTH_PX, DC_RGB, clip);
    let centre = frequency_to_px(&g, ny, nx, carrier_cycles_per_px);
    let r = window_radius_cycles_per_px;
    c.ellipse(centre, r * sx, r * sy, CIRCLE_WIDTH_PX, WINDOW_RGB, clip);
    // Bin edges: half a bin beyond the outermost bin centres.
    let edges = |n: usize| {
        let c0 = (n / 2) as f64;
        let n = n.max(1) as f64;
        ((-c0 - 0.5) / n, (n - c0 - 0.5) / n)
    };
    c.axes(&g, edges(nx), edges(ny), "fx (cycles/px)", "fy (cycles/px)");
    let title = "Fourier plane: log |spectrum|, DC at centre";
    c.text(
        title,
        (g.left as i64, (g.top / 2) as i64),
        16.0,
        BLACK,
        HPos::Left,
        VPos::Center,
        false,
    );
    let bx = (g.left + g.width + 30) as i64;
    let by = g.top as i64;
    let bar_h = (g.height as i64).min(200);
    let (blo, bhi) = if hi > lo { (lo, hi) } else { (0.0, 1.0) };
    c.colour_bar(bx, by, 18, bar_h, blo, bhi, "log magnitude");
    let ly = by + bar_h + 24;
    c.fill_rect(bx, ly - 1, 24, 3, WINDOW_RGB);
    let fc = carrier_cycles_per_px;
    let t = format!("window r = {:.4}", window_radius_cycles_per_px);
    c.text(
        &t,
        (bx + 30, ly),
        12.0,
        BLACK,
        HPos::Left,
        VPos::Center,
        false,
    );
    let t = format!("at ({:.4}, {:.4})", fc[0], fc[1]);
    c.text(
        &t,
        (bx + 30, ly + 16),
        12.0,
        BLACK,
        HPos::Left,
        VPos::Center,
        false,
    );
    c.fill_rect(bx, ly + 39, 24, 3, DC_RGB);
    let t = format!("DC exclusion r = {:.4}", dc_exclusion_cycles_per_px);
    c.text(
        &t,
        (bx + 30, ly + 40),
        12.0,
        BLACK,
        HPos::Left,
        VPos::Center,
        false,
    );
    c.text(
        "(cycles/px)",
        (bx + 30, ly + 56),
        12.0,
        BLACK,
        HPos::Left,
        VPos::Center,
        false,
    );
    c.img
}
