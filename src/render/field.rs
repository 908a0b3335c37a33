//! Pictures of complex fields: one field with axes in micrometres and a colour-wheel legend,
//! and a gallery of modes.
//!
//! Colour: hue = phase (0 red, 2 pi / 3 green, 4 pi / 3 blue), brightness = amplitude
//! relative to the largest amplitude in the field (per tile in the gallery). Fibre-plane
//! coordinates are measured from the array's centre pixel `[ny / 2, nx / 2]` (integer
//! division), x to the right, y downwards (docs/conventions.md).
use super::canvas::{cell_scale, Canvas, Geometry, BLACK, GREY};
use super::colour::complex_rgb;
use image::RgbImage;
use ndarray::{Array2, Array3, ArrayView2};
use num_complex::Complex64;
use plotters::style::text_anchor::{HPos, VPos};

/// Size of a field picture's data area (pixels, longest side, about).
const FIELD_PLOT_PX: usize = 480;
const LEFT: u32 = 78;
const TOP: u32 = 40;
const BOTTOM: u32 = 56;
const GAP: u32 = 40;
const LEGEND_W: u32 = 170;
const WHEEL_R: f64 = 55.0;

/// Layout of [`field_picture`] for a field of `ny` rows and `nx` columns.
pub fn field_geometry(ny: usize, nx: usize) -> Geometry {
    let s = cell_scale(ny.max(nx), FIELD_PLOT_PX);
    let width = ((nx.max(1) as f64 * s).round() as u32).max(1);
    let height = ((ny.max(1) as f64 * s).round() as u32).max(1);
    let legend_h = (2.0 * WHEEL_R) as u32 + 90;
    let wheel_x = (LEFT + width + GAP) as f64 + LEGEND_W as f64 / 2.0;
    let wheel_y = TOP as f64 + 30.0 + WHEEL_R;
    Geometry {
        image_width: LEFT + width + GAP + LEGEND_W,
        image_height: TOP + height.max(legend_h) + BOTTOM,
        left: LEFT,
        top: TOP,
        width,
        height,
        px_per_cell: s,
        wheel: Some((wheel_x, wheel_y, WHEEL_R)),
    }
}

fn max_abs(data: ArrayView2<Complex64>) -> f64 {
    data.iter()
        .map(|z| z.norm())
        .filter(|v| v.is_finite())
        .fold(0.0, f64::max)
}

/// A complex field: amplitude as brightness, phase as hue, axes in fibre-plane micrometres
/// (`pitch_um` per array cell), a colour-wheel legend (hue = phase, radius = amplitude).
/// An empty field gives the frame and legend with a "no data" note.
pub fn field_picture(data: &Array2<Complex64>, pitch_um: f64, title: &str) -> RgbImage {
    let (ny, nx) = data.dim();
    let g = field_geometry(ny, nx);
    let mut c = Canvas::new(g.image_width, g.image_height);
    let peak = max_abs(data.view());
    c.blit(&g, ny, nx, |r, col| complex_rgb(data[[r, col]], peak));
    let pitch = if pitch_um.is_finite() && pitch_um > 0.0 {
        pitch_um
    } else {
        1.0
    };
    // Cell centres sit at (index - n/2) * pitch, so the edges are half a cell further out.
    let edges = |n: usize| {
        let c0 = (n / 2) as f64;
        ((-c0 - 0.5) * pitch, (n as f64 - c0 - 0.5) * pitch)
    };
    let unit = if pitch_um.is_finite() && pitch_um > 0.0 {
        "µm"
    } else {
        "px"
    };
    c.axes(
        &g,
        edges(nx),
        edges(ny),
        &format!("x ({unit})"),
        &format!("y ({unit})"),
    );
    if ny == 0 || nx == 0 {
        let (l, t) = (g.left as i64, g.top as i64);
        c.text(
            "no data",
            (l + 10, t + 10),
            14.0,
            GREY,
            HPos::Left,
            VPos::Top,
            false,
        );
    }
    let title_pos = (g.left as i64, (g.top / 2) as i64);
    c.text(
        title,
        title_pos,
        16.0,
        BLACK,
        HPos::Left,
        VPos::Center,
        false,
    );
    if let Some((wx, wy, wr)) = g.wheel {
        c.wheel((wx, wy), wr, false);
        let below = (wx as i64, (wy + wr + 24.0) as i64);
        c.text(
            "hue: phase (rad)",
            below,
            12.0,
            BLACK,
            HPos::Center,
            VPos::Top,
            false,
        );
        let below2 = (below.0, below.1 + 16);
        c.text(
            "radius: |E| / max",
            below2,
            12.0,
            BLACK,
            HPos::Center,
            VPos::Top,
            false,
        );
        let note = format!("max |E| = {peak:.3e}");
        c.text(
            &note,
            (below.0, below.1 + 32),
            12.0,
            GREY,
            HPos::Center,
            VPos::Top,
            false,
        );
    }
    c.img
}

/// Size of one gallery tile (pixels, about) and of its label strip.
const TILE_PX: usize = 128;
const LABEL_H: u32 = 20;
const PAD: u32 = 8;

/// Layout of [`gallery_picture`]: picture size, tile size in pixels and the number of
/// columns actually used.
pub fn gallery_geometry(
    n_modes: usize,
    ny: usize,
    nx: usize,
    cols: usize,
) -> (u32, u32, u32, u32, usize) {
    let cols = if cols == 0 {
        ((n_modes as f64).sqrt().ceil() as usize).max(1)
    } else {
        cols.min(n_modes.max(1))
    };
    let rows = n_modes.div_ceil(cols).max(1);
    let s = cell_scale(ny.max(nx), TILE_PX);
    let tw = ((nx.max(1) as f64 * s).round() as u32).max(1);
    let th = ((ny.max(1) as f64 * s).round() as u32).max(1);
    let legend_h = 120;
    let w = (PAD + cols as u32 * (tw + PAD)).max(320);
    let h = PAD + rows as u32 * (th + LABEL_H + PAD) + legend_h;
    (w, h, tw, th, cols)
}

/// Tiles of modes (`modes[k, row, col]`), `cols` per row (0: about square), each labelled
/// and scaled to its own peak amplitude, with a colour-wheel legend below. Missing labels
/// are left blank.
pub fn gallery_picture(modes: &Array3<Complex64>, labels: &[String], cols: usize) -> RgbImage {
    let (n, ny, nx) = modes.dim();
    let (w, h, tw, th, cols) = gallery_geometry(n, ny, nx, cols);
    let mut c = Canvas::new(w, h);
    for k in 0..n {
        let (i, j) = ((k / cols) as u32, (k % cols) as u32);
        let x0 = PAD + j * (tw + PAD);
        let y0 = PAD + i * (th + LABEL_H + PAD);
        let tile = modes.index_axis(ndarray::Axis(0), k);
        let peak = max_abs(tile);
        let g = Geometry {
            image_width: w,
            image_height: h,
            left: x0,
            top: y0 + LABEL_H,
            width: tw,
            height: th,
            px_per_cell: tw as f64 / nx.max(1) as f64,
            wheel: None,
        };
        c.blit(&g, ny, nx, |r, col| complex_rgb(tile[[r, col]], peak));
        c.outline(x0 as i64, (y0 + LABEL_H) as i64, tw as i64, th as i64, GREY);
        let label = labels.get(k).map(String::as_str).unwrap_or("");
        let pos = ((x0 + tw / 2) as i64, (y0 + LABEL_H / 2) as i64);
        c.text(label, pos, 13.0, BLACK, HPos::Center, VPos::Center, false);
    }
    let wy = (h - 60) as f64;
    c.wheel((60.0, wy), 40.0, false);
    let tx = 130;
    c.text(
        "hue: phase (rad)",
        (tx, wy as i64 - 10),
        12.0,
        BLACK,
        HPos::Left,
        VPos::Center,
        false,
    );
    let note = "brightness: |ψ| / max per tile";
    c.text(
        note,
        (tx, wy as i64 + 10),
        12.0,
        BLACK,
        HPos::Left,
        VPos::Center,
        false,
    );
    c.img
}
