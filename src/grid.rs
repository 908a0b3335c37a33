//! Sampling grids, alignment parameters and complex fields that carry their grid.
//!
//! Axes (docs/conventions.md): x runs along columns to the right, y along rows *downwards*;
//! arrays are indexed `[row, col]` = `[y, x]`. Fibre-plane lengths are micrometres.
//! A grid's `origin_um` is the fibre-plane position of the centre of pixel `[0, 0]`,
//! measured from the centre pixel of the channel's region (x0 + width/2, y0 + height/2).
use ndarray::Array2;
use num_complex::Complex64;
use serde::{Deserialize, Serialize};

/// A regular grid of square pixels in the fibre plane.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Grid {
    /// Number of columns (x).
    pub nx: usize,
    /// Number of rows (y).
    pub ny: usize,
    /// Pixel pitch in the fibre plane, micrometres.
    pub pitch_um: f64,
    /// Fibre-plane (x, y) of the centre of pixel [0, 0], micrometres, from the region centre.
    pub origin_um: [f64; 2],
}

impl Grid {
    /// A grid whose pixel (nx/2, ny/2) (integer division) sits at the origin, the
    /// placement of a region's centre pixel.
    pub fn centred(nx: usize, ny: usize, pitch_um: f64) -> Self {
        Grid {
            nx,
            ny,
            pitch_um,
            origin_um: [-((nx / 2) as f64) * pitch_um, -((ny / 2) as f64) * pitch_um],
        }
    }

    /// Fibre-plane x of column `col`, micrometres.
    #[inline]
    pub fn x_um(&self, col: usize) -> f64 {
        self.origin_um[0] + col as f64 * self.pitch_um
    }

    /// Fibre-plane y of row `row`, micrometres (y grows downwards).
    #[inline]
    pub fn y_um(&self, row: usize) -> f64 {
        self.origin_um[1] + row as f64 * self.pitch_um
    }

    /// Area of one pixel, square micrometres.
    #[inline]
    pub fn pixel_area_um2(&self) -> f64 {
        self.pitch_um * self.pitch_um
    }

    /// Number of pixels.
    pub fn len(&self) -> usize {
        self.nx * self.ny
    }

    /// True when the grid has no pixel.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }
}

/// Where the fibre's mode pattern sits on a channel's grid and how its wavefront is bent.
///
/// Signs (docs/conventions.md): the fibre axis is at `center_um` (x, y) from the region's
/// centre pixel; the pattern is rotated by `rotation_deg` from +x towards +y; `scale`
/// multiplies the nominal magnification; the signal carries the phase
/// `+2 pi / lambda * (tilt_x x + tilt_y y)` (tilt in rad = mrad / 1000); the imaged plane lies
/// `defocus_um` downstream of the fibre face (the recorded field is the face field
/// propagated by `+defocus_um`).
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Alignment {
    pub center_um: [f64; 2],
    pub rotation_deg: f64,
    pub scale: f64,
    pub tilt_mrad: [f64; 2],
    pub defocus_um: f64,
}

impl Default for Alignment {
    fn default() -> Self {
        Alignment {
            center_um: [0.0, 0.0],
            rotation_deg: 0.0,
            scale: 1.0,
            tilt_mrad: [0.0, 0.0],
            defocus_um: 0.0,
        }
    }
}

impl Alignment {
    /// Map a grid position (x, y) in micrometres to the fibre's own coordinates (u, v):
    /// shift to the fibre axis, undo the rotation, undo the scale.
    #[inline]
    pub fn to_fibre(&self, x_um: f64, y_um: f64) -> (f64, f64) {
        let (s, c) = self.rotation_deg.to_radians().sin_cos();
        let dx = x_um - self.center_um[0];
        let dy = y_um - self.center_um[1];
        (
            (c * dx + s * dy) / self.scale,
            (-s * dx + c * dy) / self.scale,
        )
    }

    /// Inverse of [`Alignment::to_fibre`]: fibre coordinates (u, v) to grid position (x, y).
    #[inline]
    pub fn from_fibre(&self, u_um: f64, v_um: f64) -> (f64, f64) {
        let (s, c) = self.rotation_deg.to_radians().sin_cos();
        let (u, v) = (u_um * self.scale, v_um * self.scale);
        (
            c * u - s * v + self.center_um[0],
            s * u + c * v + self.center_um[1],
        )
    }
}

/// A complex field on a grid at a wavelength. `data` is indexed `[row, col]`.
///
/// Normalisation: sum |E|^2 * pixel_area_um2 over the grid is the signal's power in camera
/// counts (summed over the region's pixels), when the reference amplitude is known.
#[derive(Debug, Clone, PartialEq)]
pub struct Field {
    pub data: Array2<Complex64>,
    pub grid: Grid,
    pub wavelength_nm: f64,
}

impl Field {
    /// Total power, sum |E|^2 dA.
    pub fn power(&self) -> f64 {
        self.data.iter().map(|z| z.norm_sqr()).sum::<f64>() * self.grid.pixel_area_um2()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn centred_grid_puts_centre_pixel_at_origin() {
        let g = Grid::centred(256, 128, 0.5);
        assert_eq!(g.x_um(128), 0.0);
        assert_eq!(g.y_um(64), 0.0);
        let g = Grid::centred(5, 5, 1.0);
        assert_eq!(g.x_um(2), 0.0);
    }

    #[test]
    fn rotation_turns_x_towards_y() {
        let a = Alignment {
            rotation_deg: 90.0,
            ..Default::default()
        };
        // A feature at fibre (1, 0) appears on +y of the grid.
        let (x, y) = a.from_fibre(1.0, 0.0);
        assert!(x.abs() < 1e-12 && (y - 1.0).abs() < 1e-12);
        let (u, v) = a.to_fibre(x, y);
        assert!((u - 1.0).abs() < 1e-12 && v.abs() < 1e-12);
    }

    #[test]
    fn scale_and_centre_round_trip() {
        let a = Alignment {
            center_um: [3.0, -2.0],
            rotation_deg: 17.0,
            scale: 1.1,
            ..Default::default()
        };
        let (x, y) = a.from_fibre(4.0, 5.0);
        let (u, v) = a.to_fibre(x, y);
        assert!((u - 4.0).abs() < 1e-12 && (v - 5.0).abs() < 1e-12);
    }
}
