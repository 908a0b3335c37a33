//! Colour maps: complex values as colour (phase as hue, amplitude as brightness) and
//! real values on a perceptually ordered ramp.
use num_complex::Complex64;

/// RGB of a complex value: hue from the phase (0 rad red, 2 pi / 3 green, 4 pi / 3 blue),
/// value (brightness) from `|z| / max_abs`, clipped to 1, full saturation.
pub fn complex_rgb(z: Complex64, max_abs: f64) -> [u8; 3] {
    let v = if max_abs > 0.0 {
        (z.norm() / max_abs).clamp(0.0, 1.0)
    } else {
        0.0
    };
    let hue = z.arg().rem_euclid(std::f64::consts::TAU) / std::f64::consts::TAU * 6.0;
    hsv_rgb(hue, 1.0, v)
}

/// HSV to RGB with hue in [0, 6), saturation and value in [0, 1].
pub fn hsv_rgb(h6: f64, s: f64, v: f64) -> [u8; 3] {
    let i = h6.floor();
    let f = h6 - i;
    let p = v * (1.0 - s);
    let q = v * (1.0 - s * f);
    let t = v * (1.0 - s * (1.0 - f));
    let (r, g, b) = match (i as i64).rem_euclid(6) {
        0 => (v, t, p),
        1 => (q, v, p),
        2 => (p, v, t),
        3 => (p, q, v),
        4 => (t, p, v),
        _ => (v, p, q),
    };
    [
        (r * 255.0).round() as u8,
        (g * 255.0).round() as u8,
        (b * 255.0).round() as u8,
    ]
}

/// A dark-blue -> teal -> yellow ramp for real values in [0, 1] (clipped).
pub fn ramp_rgb(t: f64) -> [u8; 3] {
    const STOPS: [[f64; 3]; 5] = [
        [0.050, 0.030, 0.330],
        [0.230, 0.320, 0.550],
        [0.130, 0.570, 0.550],
        [0.450, 0.780, 0.320],
        [0.990, 0.910, 0.150],
    ];
    let t = if t.is_finite() {
        t.clamp(0.0, 1.0)
    } else {
        0.0
    };
    let x = t * (STOPS.len() - 1) as f64;
    let i = (x.floor() as usize).min(STOPS.len() - 2);
    let f = x - i as f64;
    let c = |k: usize| ((STOPS[i][k] * (1.0 - f) + STOPS[i + 1][k] * f) * 255.0).round() as u8;
    [c(0), c(1), c(2)]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn phase_sets_hue_and_amplitude_sets_brightness() {
        assert_eq!(complex_rgb(Complex64::new(1.0, 0.0), 1.0), [255, 0, 0]);
        let g = complex_rgb(Complex64::from_polar(1.0, std::f64::consts::TAU / 3.0), 1.0);
        assert_eq!(g, [0, 255, 0]);
        assert_eq!(complex_rgb(Complex64::new(0.0, 0.0), 1.0), [0, 0, 0]);
        let half = complex_rgb(Complex64::new(0.5, 0.0), 1.0);
        assert_eq!(half, [128, 0, 0]);
    }
}
