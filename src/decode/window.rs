//! The spectral window around the signal's sideband: radius (given or automatic), smooth edge,
//! and the separation margin to the DC (autocorrelation) order and the twin.
//!
//! Separation (Cuche, Marquet & Depeursinge 2000, Appl. Opt. 39, 4070; Goodman, Introduction
//! to Fourier Optics, minimum reference angle): a signal band-limited to radius B has an
//! autocorrelation (DC) term of radius 2B, so a sideband at |c| from DC stays clear of it when
//! |c| >= 3B; a window of radius R around the sideband must therefore satisfy R <= |c|/3, and
//! R <= |c - (-c)|/2 = |c| from the twin. The spectrum of a sampled frame is periodic with
//! period 1 cycle/px, so the DC order and the twin repeat at every integer lattice point;
//! the same bounds apply to those copies (this is what keeps the window inside Nyquist).

/// Distances (cycles/px) from `c` to the nearest copy of DC and of the twin `-c`, over the
/// periodic copies of the spectrum at integer shifts.
pub fn order_distances(c: [f64; 2]) -> (f64, f64) {
    let mut dc = f64::INFINITY;
    let mut twin = f64::INFINITY;
    for nx in -1..=1 {
        for ny in -1..=1 {
            let (sx, sy) = (nx as f64, ny as f64);
            dc = dc.min(((c[0] - sx).powi(2) + (c[1] - sy).powi(2)).sqrt());
            twin = twin.min(((2.0 * c[0] - sx).powi(2) + (2.0 * c[1] - sy).powi(2)).sqrt());
        }
    }
    (dc, twin)
}

/// The largest window radius (cycles/px) that keeps the sideband clear of the DC order
/// (R <= d_dc / 3) and of the twin (R <= d_twin / 2).
pub fn auto_radius(c: [f64; 2]) -> f64 {
    let (dc, twin) = order_distances(c);
    (dc / 3.0).min(twin / 2.0)
}

/// Separation margin, cycles/px: distance from the window's edge to the edge of the DC term,
/// `d_dc - R - 2 B` with B the signal's band radius (the window radius when unknown);
/// negative when the window reaches into the DC order.
pub fn separation_margin(c: [f64; 2], radius: f64, band: Option<f64>) -> f64 {
    let (dc, _) = order_distances(c);
    dc - radius - 2.0 * band.unwrap_or(radius)
}

/// Window weight at distance `d` from the sideband centre: 1 inside `R (1 - edge)`, a
/// raised-cosine fall to 0 at `R` (`edge` is the fraction of the radius the fall takes;
/// 0 = hard circular edge).
#[inline]
pub fn weight(d: f64, radius: f64, edge: f64) -> f64 {
    if d > radius {
        return 0.0;
    }
    let inner = radius * (1.0 - edge);
    if d <= inner || edge <= 0.0 {
        return 1.0;
    }
    let t = (d - inner) / (radius - inner);
    0.5 * (1.0 + (std::f64::consts::PI * t).cos())
}

#[cfg(test)]
mod tests {
    use super::*;

    // Cuche 2000 / Goodman separation rule, R = |c|/3 for a carrier well inside Nyquist.
    #[test]
    fn auto_radius_is_a_third_of_the_carrier_distance() {
        let r = auto_radius([0.2, 0.0]);
        assert!((r - 0.2 / 3.0).abs() < 1e-12);
        // near Nyquist the periodic copy of DC at (1, 0) takes over
        let r = auto_radius([0.45, 0.0]);
        assert!((r - 0.1 / 2.0).abs() < 1e-12, "{r}");
    }

    #[test]
    fn edge_is_continuous() {
        assert_eq!(weight(0.5, 1.0, 0.2), 1.0);
        assert!((weight(0.9, 1.0, 0.2) - 0.5).abs() < 1e-12);
        assert!(weight(0.999, 1.0, 0.2) < 1e-4);
        assert_eq!(weight(1.01, 1.0, 0.2), 0.0);
    }
}
