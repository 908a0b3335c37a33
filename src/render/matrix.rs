//! Pictures of transfer matrices and their figures of merit.
//!
//! Matrix layout as in docs/conventions.md: row = `out_channel * n_modes + mode`, column =
//! `in_polarisation * n_modes + mode`. Cell `[row, col]` of the picture is entry
//! `M[row, col]`, rows downwards, columns to the right.
//!
//! - [`matrix_db_picture`]: `10 log10(|M|^2 / max |M|^2)` (dB, 0 at the largest entry),
//!   clipped below at `floor_db`; white lines between mode groups inside each block and
//!   thicker white lines between polarisation / channel blocks.
//! - [`matrix_phase_picture`]: `arg M` as hue; entries weaker than -20 dB (relative power)
//!   are dimmed, linearly in dB down to 15 % brightness at -37 dB.
//! - [`group_power_picture`]: `10 log10 P[out group, in group]` with the values written in.
//! - [`singular_values_chart`]: `10 log10 s_i^2` against the index.
use super::canvas::{nice_ticks, plotters_picture, Canvas, Geometry, BLACK, WHITE};
use super::colour::{complex_rgb, ramp_rgb};
use image::RgbImage;
use ndarray::Array2;
use num_complex::Complex64;
use plotters::prelude::*;
use plotters::style::text_anchor::{HPos, VPos};

/// Colour of group and block boundary lines.
pub const BOUNDARY_RGB: [u8; 3] = WHITE;

const PLOT_PX: usize = 600;
const LEFT: u32 = 80;
const TOP: u32 = 60;
const BOTTOM: u32 = 60;
const LEGEND_W: u32 = 160;

/// Layout of the matrix pictures for a `rows` x `cols` matrix: an integer number of pixels
/// per entry, so that the boundary before index `k` lies at pixel `left + k * px_per_cell`.
pub fn matrix_geometry(rows: usize, cols: usize) -> Geometry {
    let n = rows.max(cols).max(1);
    let s = (PLOT_PX / n).max(1) as f64;
    let width = (cols.max(1) as f64 * s) as u32;
    let height = (rows.max(1) as f64 * s) as u32;
    Geometry {
        image_width: LEFT + width + LEGEND_W,
        image_height: TOP + height.max(260) + BOTTOM,
        left: LEFT,
        top: TOP,
        width,
        height,
        px_per_cell: s,
        wheel: None,
    }
}

/// Boundaries along one axis of `len` entries in blocks of `n_modes`: (index, thick).
/// Group boundaries are where `groups[k] != groups[k - 1]`; block boundaries at multiples
/// of `n_modes`. Nothing when `groups` does not have `n_modes` entries or `len` is not a
/// multiple of `n_modes`.
pub fn boundaries(len: usize, groups: &[u32], n_modes: usize) -> Vec<(usize, bool)> {
    if n_modes == 0 || groups.len() != n_modes || !len.is_multiple_of(n_modes) {
        return Vec::new();
    }
    let mut out = Vec::new();
    for b in 0..len / n_modes {
        if b > 0 {
            out.push((b * n_modes, true));
        }
        for k in 1..n_modes {
            if groups[k] != groups[k - 1] {
                out.push((b * n_modes + k, false));
            }
        }
    }
    out
}

/// Pixel columns (or rows) a boundary line covers, relative to the boundary pixel
/// `left + k * px_per_cell`: thin lines 2 px (1 px when cells are under 4 px), thick 4 px
/// (2 px), centred on the boundary.
pub fn line_offsets(px_per_cell: f64, thick: bool) -> std::ops::Range<i64> {
    match (px_per_cell >= 4.0, thick) {
        (true, false) => -1..1,
        (true, true) => -2..2,
        (false, false) => 0..1,
        (false, true) => -1..1,
    }
}

fn matrix_frame(c: &mut Canvas, g: &Geometry, rows: usize, cols: usize, n_modes: usize) {
    c.axes(
        g,
        (-0.5, cols as f64 - 0.5),
        (-0.5, rows as f64 - 0.5),
        "input index (polarisation × modes + mode)",
        "output index (channel × modes + mode)",
    );
    if n_modes > 0 && cols.is_multiple_of(n_modes) && rows.is_multiple_of(n_modes) {
        let bw = n_modes as f64 * g.px_per_cell;
        for b in 0..cols / n_modes {
            let x = (g.left as f64 + (b as f64 + 0.5) * bw) as i64;
            let s = format!("in {}", b + 1);
            c.text(
                &s,
                (x, g.top as i64 - 6),
                12.0,
                BLACK,
                HPos::Center,
                VPos::Bottom,
                false,
            );
        }
        for b in 0..rows / n_modes {
            let y = (g.top as f64 + (b as f64 + 0.5) * bw) as i64;
            let x = (g.left + g.width + 6) as i64;
            let s = format!("out {}", b + 1);
            c.text(&s, (x, y), 12.0, BLACK, HPos::Left, VPos::Center, false);
        }
    }
}

/// `|M|^2` in dB relative to the largest entry, clipped at `floor_db` (e.g. -40), with
/// mode-group and block boundaries (`groups[mode]`, `n_modes` modes per block) and a
/// colour bar in dB.
pub fn matrix_db_picture(
    m: &Array2<Complex64>,
    groups: &[u32],
    n_modes: usize,
    floor_db: f64,
) -> RgbImage {
    let (rows, cols) = m.dim();
    let g = matrix_geometry(rows, cols);
    let mut c = Canvas::new(g.image_width, g.image_height);
    let floor_db = if floor_db.is_finite() && floor_db < 0.0 {
        floor_db
    } else {
        -40.0
    };
    let peak = m
        .iter()
        .map(|z| z.norm_sqr())
        .filter(|v| v.is_finite())
        .fold(0.0, f64::max);
    c.blit(&g, rows, cols, |r, col| {
        let p = m[[r, col]].norm_sqr();
        let db = if peak > 0.0 && p > 0.0 {
            10.0 * (p / peak).log10()
        } else {
            floor_db
        };
        ramp_rgb((db - floor_db) / -floor_db)
    });
    let s = g.px_per_cell;
    for (k, thick) in boundaries(cols, groups, n_modes) {
        let x = g.left as i64 + (k as f64 * s) as i64;
        for o in line_offsets(s, thick) {
            c.fill_rect(x + o, g.top as i64, 1, g.height as i64, BOUNDARY_RGB);
        }
    }
    for (k, thick) in boundaries(rows, groups, n_modes) {
        let y = g.top as i64 + (k as f64 * s) as i64;
        for o in line_offsets(s, thick) {
            c.fill_rect(g.left as i64, y + o, g.width as i64, 1, BOUNDARY_RGB);
        }
    }
    matrix_frame(&mut c, &g, rows, cols, n_modes);
    let title = "|M|² (dB re. largest entry); lines: mode groups, blocks";
    c.text(
        title,
        (g.left as i64, 18),
        15.0,
        BLACK,
        HPos::Left,
        VPos::Center,
        false,
    );
    let bx = (g.left + g.width + 60) as i64;
    c.colour_bar(bx, g.top as i64, 18, 220, floor_db, 0.0, "dB");
    c.img
}

/// `arg M` as hue (cyclic), brightness 1 down to -20 dB relative power and dimmed below.
pub fn matrix_phase_picture(m: &Array2<Complex64>) -> RgbImage {
    let (rows, cols) = m.dim();
    let g = matrix_geometry(rows, cols);
    let mut c = Canvas::new(g.image_width, g.image_height);
    let peak = m
        .iter()
        .map(|z| z.norm_sqr())
        .filter(|v| v.is_finite())
        .fold(0.0, f64::max);
    c.blit(&g, rows, cols, |r, col| {
        let z = m[[r, col]];
        let p = z.norm_sqr();
        let db = if peak > 0.0 && p > 0.0 {
            10.0 * (p / peak).log10()
        } else {
            f64::NEG_INFINITY
        };
        let v = ((db + 40.0) / 20.0).clamp(0.15, 1.0);
        complex_rgb(Complex64::from_polar(v, z.arg()), 1.0)
    });
    matrix_frame(&mut c, &g, rows, cols, 0);
    let title = "arg M (hue); entries below -20 dB dimmed";
    c.text(
        title,
        (g.left as i64, 18),
        15.0,
        BLACK,
        HPos::Left,
        VPos::Center,
        false,
    );
    let (wx, wy) = ((g.left + g.width + 75) as f64, (g.top + 70) as f64);
    c.wheel((wx, wy), 45.0, true);
    c.text(
        "phase (rad)",
        (wx as i64, wy as i64 + 66),
        12.0,
        BLACK,
        HPos::Center,
        VPos::Top,
        false,
    );
    c.img
}

/// Group power matrix `P[out group, in group]` in dB (`10 log10 P`), colour over the top
/// 40 dB, values written in the cells, groups labelled `G1`, `G2`, ...
pub fn group_power_picture(p: &Array2<f64>) -> RgbImage {
    let (rows, cols) = p.dim();
    let n = rows.max(cols).max(1);
    let s = (420 / n).clamp(24, 96) as f64;
    let (left, top) = (90u32, 60u32);
    let g = Geometry {
        image_width: left + (cols as f64 * s) as u32 + 160,
        image_height: top + ((rows as f64 * s) as u32).max(240) + 70,
        left,
        top,
        width: ((cols.max(1) as f64) * s) as u32,
        height: ((rows.max(1) as f64) * s) as u32,
        px_per_cell: s,
        wheel: None,
    };
    let mut c = Canvas::new(g.image_width, g.image_height);
    let db = p.mapv(|v| {
        if v > 0.0 {
            10.0 * v.log10()
        } else {
            f64::NEG_INFINITY
        }
    });
    let top_db = db
        .iter()
        .copied()
        .filter(|v| v.is_finite())
        .fold(f64::NEG_INFINITY, f64::max);
    let top_db = if top_db.is_finite() {
        top_db.ceil()
    } else {
        0.0
    };
    let lo = top_db - 40.0;
    c.blit(&g, rows, cols, |r, col| {
        ramp_rgb((db[[r, col]] - lo) / 40.0)
    });
    c.outline(
        g.left as i64,
        g.top as i64,
        g.width as i64,
        g.height as i64,
        BLACK,
    );
    for i in 0..rows {
        for j in 0..cols {
            let (x, y) = g.data_to_px(i as f64, j as f64);
            let v = db[[i, j]];
            if s >= 36.0 {
                let t = if v.is_finite() {
                    format!("{v:.1}")
                } else {
                    "-inf".into()
                };
                let fg = if (v - lo) / 40.0 > 0.55 { BLACK } else { WHITE };
                c.text(
                    &t,
                    (x as i64, y as i64),
                    12.0,
                    fg,
                    HPos::Center,
                    VPos::Center,
                    false,
                );
            }
        }
    }
    for j in 0..cols {
        let (x, _) = g.data_to_px(0.0, j as f64);
        let pos = (x as i64, (g.top + g.height + 6) as i64);
        c.text(
            &format!("G{}", j + 1),
            pos,
            12.0,
            BLACK,
            HPos::Center,
            VPos::Top,
            false,
        );
    }
    for i in 0..rows {
        let (_, y) = g.data_to_px(i as f64, 0.0);
        let pos = (g.left as i64 - 8, y as i64);
        c.text(
            &format!("G{}", i + 1),
            pos,
            12.0,
            BLACK,
            HPos::Right,
            VPos::Center,
            false,
        );
    }
    let (l, t, w, h) = (g.left as i64, g.top as i64, g.width as i64, g.height as i64);
    c.text(
        "input group",
        (l + w / 2, t + h + 28),
        13.0,
        BLACK,
        HPos::Center,
        VPos::Top,
        false,
    );
    c.text(
        "output group",
        (l - 48, t + h / 2),
        13.0,
        BLACK,
        HPos::Center,
        VPos::Center,
        true,
    );
    let title = "group power (dB)";
    c.text(title, (l, 24), 15.0, BLACK, HPos::Left, VPos::Center, false);
    c.colour_bar(l + w + 40, t, 18, 200, lo, top_db, "dB");
    c.img
}

/// A line chart of `values` against their index (points joined), with a title and labels.
/// Non-finite values are left out.
pub fn line_chart(values: &[f64], title: &str, x_label: &str, y_label: &str) -> RgbImage {
    let pts: Vec<(f64, f64)> = values
        .iter()
        .enumerate()
        .filter(|(_, v)| v.is_finite())
        .map(|(i, &v)| (i as f64, v))
        .collect();
    let (mut lo, mut hi) = pts
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), p| {
            (a.min(p.1), b.max(p.1))
        });
    if hi.partial_cmp(&lo) != Some(std::cmp::Ordering::Greater) {
        let mid = if lo.is_finite() { lo } else { 0.0 };
        (lo, hi) = (mid - 1.0, mid + 1.0);
    }
    let pad = 0.06 * (hi - lo);
    let xmax = (values.len().max(2) - 1) as f64;
    let (_, step) = nice_ticks(0.0, xmax, 10);
    let step = step.max(1.0);
    plotters_picture(800, 420, |root| {
        root.fill(&RGBColor(255, 255, 255)).ok()?;
        let mut chart = ChartBuilder::on(root)
            .caption(title, (super::canvas::FONT, 18))
            .margin(14)
            .x_label_area_size(44)
            .y_label_area_size(64)
            .build_cartesian_2d(-0.5..xmax + 0.5, (lo - pad)..(hi + pad))
            .ok()?;
        chart
            .configure_mesh()
            .x_desc(x_label)
            .y_desc(y_label)
            .x_labels(((xmax / step) as usize + 2).min(12))
            .x_label_formatter(&|v| format!("{v:.0}"))
            .light_line_style(RGBColor(235, 235, 235))
            .draw()
            .ok()?;
        let blue = RGBColor(30, 80, 180);
        chart
            .draw_series(LineSeries::new(pts.iter().copied(), blue.stroke_width(2)))
            .ok()?;
        chart
            .draw_series(pts.iter().map(|&p| Circle::new(p, 3, blue.filled())))
            .ok()?;
        Some(())
    })
}

/// `10 log10 s_i^2` of the singular values against their index (0-based). Zero singular
/// values are left out.
pub fn singular_values_chart(s: &[f64]) -> RgbImage {
    let db: Vec<f64> = s.iter().map(|v| 20.0 * v.abs().log10()).collect();
    line_chart(&db, "singular values s_i² (dB)", "index i", "s_i² (dB)")
}
