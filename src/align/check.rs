//! Check items of `modegram check`: pass / warn / fail from measured numbers, each with its
//! threshold and a concrete hint (what to move, by about how much, which way).
//!
//! Contract: [`evaluate`] turns one channel's [`Measured`] numbers into [`Item`]s; it does no
//! I/O and no decoding, so every threshold and hint is testable on its own. The thresholds
//! and their sources are listed in docs/alignment.md and in [`Thresholds`].
//!
//! Signs (docs/conventions.md): x to the right on the camera, y downwards; a centroid at
//! +x must move towards -x (left); `defocus_um > 0` means the imaged plane lies downstream of
//! the fibre face (between the face and the imaging lens).
use serde::Serialize;

/// Outcome of one item.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, PartialOrd, Ord)]
#[serde(rename_all = "lowercase")]
pub enum Status {
    Pass,
    /// Not measurable with the given inputs (e.g. no reference frame).
    Skip,
    Warn,
    Fail,
}

impl Status {
    pub fn as_str(&self) -> &'static str {
        match self {
            Status::Pass => "pass",
            Status::Skip => "skip",
            Status::Warn => "warn",
            Status::Fail => "fail",
        }
    }
}

/// One line of check.json.
#[derive(Debug, Clone, Serialize)]
pub struct Item {
    pub channel: String,
    pub name: String,
    pub status: Status,
    pub value: Option<f64>,
    /// The limit that decided the status (or the warning limit when passing).
    pub threshold: Option<f64>,
    pub unit: String,
    pub hint: String,
}

/// Thresholds. Sources: see the field docs and docs/alignment.md.
#[derive(Debug, Clone, Copy)]
pub struct Thresholds {
    /// Fringe period below this fails: Nyquist, 2 px per fringe (Picart (ed.), New
    /// Techniques in Digital Holography, 2015).
    pub period_fail_px: f64,
    /// Fringe period below this warns: 3 px, common practice, no source.
    pub period_warn_px: f64,
    /// Carrier within this angle of a pixel axis warns (the streaks of the region's edges
    /// run along the axes): common practice, no source.
    pub axis_warn_deg: f64,
    /// Separation margin (|c| - W) / (2 B) below 1 fails: the window reaches into the DC
    /// order, which spans 2 B for a signal of bandwidth B (Cuche, Marquet & Depeursinge
    /// 2000, Appl. Opt. 39, 4070: |c| >= 3 B); below this warns (common practice, no source).
    pub separation_warn: f64,
    /// Fringe visibility below these warns / fails: common practice, no source.
    pub visibility_warn: f64,
    pub visibility_fail: f64,
    /// Saturated pixel fraction above 0 warns, above this fails (0.1 %): common practice.
    pub saturation_fail_frac: f64,
    /// Reference min/max over the signal area below these warns / fails: common practice.
    pub uniformity_warn: f64,
    pub uniformity_fail: f64,
    /// Peak counts below this fraction of full scale warns (10 %), below the second fails
    /// (1 %): common practice, no source.
    pub level_warn_frac: f64,
    pub level_fail_frac: f64,
    /// Centring offset as a fraction of the core radius: warn / fail (common practice).
    pub centre_warn_frac: f64,
    pub centre_fail_frac: f64,
    /// |defocus| above these many depths of focus (lambda / NA^2) warns / fails: common
    /// practice, no source (depth of focus: Born & Wolf, Principles of Optics, 8.8).
    pub focus_warn_dof: f64,
    pub focus_fail_dof: f64,
    /// Captured power below these warns / fails: common practice, no source.
    pub captured_warn: f64,
    pub captured_fail: f64,
}

impl Default for Thresholds {
    fn default() -> Self {
        Thresholds {
            period_fail_px: 2.0,
            period_warn_px: 3.0,
            axis_warn_deg: 3.0,
            separation_warn: 1.2,
            visibility_warn: 0.3,
            visibility_fail: 0.1,
            saturation_fail_frac: 1e-3,
            uniformity_warn: 0.5,
            uniformity_fail: 0.2,
            level_warn_frac: 0.1,
            level_fail_frac: 0.01,
            centre_warn_frac: 0.1,
            centre_fail_frac: 0.3,
            focus_warn_dof: 1.0,
            focus_fail_dof: 3.0,
            captured_warn: 0.9,
            captured_fail: 0.7,
        }
    }
}

/// What was measured on one channel. `None`: not measured (the item is skipped).
#[derive(Debug, Clone, Default)]
pub struct Measured {
    /// Signal sideband position, cycles per pixel (fx, fy).
    pub carrier_cycles_per_px: Option<[f64; 2]>,
    /// Window radius, cycles per pixel.
    pub window_radius: Option<f64>,
    /// Signal bandwidth B, cycles per pixel (NA / (M lambda) in camera units).
    pub bandwidth: Option<f64>,
    /// Energy of the sideband window over the energy of the DC order.
    pub sideband_to_dc: Option<f64>,
    /// Mean reference over mean signal intensity in the region (when a reference is given).
    pub beam_ratio: Option<f64>,
    /// Fraction of the region's pixels at or above saturation, over the frames checked.
    pub saturated_fraction: Option<f64>,
    /// Peak counts over the frames checked, and the full scale.
    pub peak_counts: Option<f64>,
    pub full_scale_counts: Option<f64>,
    /// min / max of |R|^2 over the signal area.
    pub reference_uniformity: Option<f64>,
    /// Intensity centroid of the field, fibre-plane um from the region centre.
    pub centroid_um: Option<[f64; 2]>,
    /// Fitted defocus, um (imaged plane downstream of the face for > 0).
    pub defocus_um: Option<f64>,
    /// Captured power fraction at the setup's alignment.
    pub captured: Option<f64>,
    /// Distance of the sideband from the nearest copy of the DC order (the spectrum is
    /// periodic with 1 cycle/px); None: |carrier|.
    pub dc_distance: Option<f64>,
}

/// Fixed context for hints.
#[derive(Debug, Clone)]
pub struct Context {
    pub channel: String,
    pub core_radius_um: f64,
    pub wavelength_nm: f64,
    pub na: f64,
    /// Magnification x scale (fibre plane -> camera).
    pub magnification: f64,
    pub pixel_pitch_um: f64,
    /// The setup's present values, for "or set ..." hints.
    pub center_um: [f64; 2],
    pub defocus_um: f64,
}

fn item(
    ctx: &Context,
    name: &str,
    status: Status,
    value: Option<f64>,
    threshold: Option<f64>,
    unit: &str,
    hint: String,
) -> Item {
    Item {
        channel: ctx.channel.clone(),
        name: name.into(),
        status,
        value,
        threshold,
        unit: unit.into(),
        hint,
    }
}

fn skipped(ctx: &Context, name: &str, unit: &str, why: &str) -> Item {
    item(ctx, name, Status::Skip, None, None, unit, why.into())
}

/// Lower-is-worse grading: value below `fail` fails, below `warn` warns.
fn grade_low(v: f64, warn: f64, fail: f64) -> (Status, f64) {
    if v < fail {
        (Status::Fail, fail)
    } else if v < warn {
        (Status::Warn, warn)
    } else {
        (Status::Pass, warn)
    }
}

/// Higher-is-worse grading.
fn grade_high(v: f64, warn: f64, fail: f64) -> (Status, f64) {
    if v > fail {
        (Status::Fail, fail)
    } else if v > warn {
        (Status::Warn, warn)
    } else {
        (Status::Pass, warn)
    }
}

/// Evaluate every item of one channel.
pub fn evaluate(m: &Measured, ctx: &Context, th: &Thresholds) -> Vec<Item> {
    let mut out = Vec::new();
    // Fringe period and angle.
    match m.carrier_cycles_per_px {
        Some(c) => {
            let f = (c[0] * c[0] + c[1] * c[1]).sqrt();
            let period = 1.0 / f;
            let angle = c[1].atan2(c[0]).to_degrees();
            let (st, t) = grade_low(period, th.period_warn_px, th.period_fail_px);
            let hint = match st {
                Status::Pass => format!("{period:.2} px per fringe at {angle:.1} deg"),
                _ => format!(
                    "{period:.2} px per fringe at {angle:.1} deg is too fine: reduce the angle between reference and signal beams by about {:.0}% (to >= {:.1} px per fringe)",
                    100.0 * (1.0 - period / th.period_warn_px),
                    th.period_warn_px
                ),
            };
            out.push(item(
                ctx,
                "fringe_period",
                st,
                Some(period),
                Some(t),
                "px",
                hint,
            ));
            // Angle from the nearest pixel axis.
            let off_axis = (angle.rem_euclid(90.0)).min(90.0 - angle.rem_euclid(90.0));
            let st = if off_axis < th.axis_warn_deg {
                Status::Warn
            } else {
                Status::Pass
            };
            let hint = if st == Status::Warn {
                format!("the fringes run {off_axis:.1} deg from a pixel axis: the region-edge streaks along the axes overlap the sideband; rotate the reference tilt to about 30-60 deg")
            } else {
                format!("carrier at {angle:.1} deg")
            };
            out.push(item(
                ctx,
                "fringe_angle",
                st,
                Some(off_axis),
                Some(th.axis_warn_deg),
                "deg from axis",
                hint,
            ));
        }
        None => out.push(skipped(ctx, "fringe_period", "px", "no carrier found")),
    }
    // Separation of the sideband from the DC order.
    match (m.carrier_cycles_per_px, m.window_radius, m.bandwidth) {
        (Some(c), Some(w), Some(b)) if b > 0.0 => {
            let f = m.dc_distance.unwrap_or((c[0] * c[0] + c[1] * c[1]).sqrt());
            let margin = (f - w) / (2.0 * b);
            let (st, t) = grade_low(margin, th.separation_warn, 1.0);
            let need = w + 2.0 * b * th.separation_warn;
            let hint = match st {
                Status::Pass => format!("sideband at {f:.3} cyc/px, window {w:.3}, DC order to {:.3}", 2.0 * b),
                _ => format!(
                    "the window (radius {w:.3} cyc/px around {f:.3}) reaches {} the DC order (radius {:.3}): tilt the reference more, to >= {need:.3} cyc/px ({:.1} px per fringe), or set window_radius <= {:.3}",
                    if margin < 1.0 { "into" } else { "close to" },
                    2.0 * b,
                    1.0 / need,
                    (f - 2.0 * b * th.separation_warn).max(0.0)
                ),
            };
            out.push(item(
                ctx,
                "separation",
                st,
                Some(margin),
                Some(t),
                "x (|c|-W)/2B",
                hint,
            ));
        }
        _ => out.push(skipped(
            ctx,
            "separation",
            "x (|c|-W)/2B",
            "carrier, window or bandwidth unknown",
        )),
    }
    // Fringe visibility from the sideband / DC energy ratio: for uniform beams of
    // intensities s and r, ratio = s r / (s + r)^2 = V^2 / 4 (V = 2 sqrt(s r) / (s + r),
    // Born & Wolf, Principles of Optics, 7.3).
    match m.sideband_to_dc {
        Some(q) => {
            let v = (4.0 * q.max(0.0)).sqrt().min(1.0);
            let (st, t) = grade_low(v, th.visibility_warn, th.visibility_fail);
            let mut hint = format!("fringe visibility {v:.2}");
            if st != Status::Pass {
                match m.beam_ratio {
                    Some(r) if r > 1.0 => hint += &format!(": the reference is {r:.1}x stronger than the signal; attenuate it by about {r:.1}x"),
                    Some(r) if r > 0.0 => hint += &format!(": the signal is {:.1}x stronger than the reference; attenuate the signal or raise the reference by about {:.1}x", 1.0 / r, 1.0 / r),
                    _ => hint += ": balance the beam intensities, check polarisation match and path-length difference (coherence)",
                }
            }
            out.push(item(ctx, "visibility", st, Some(v), Some(t), "", hint));
        }
        None => out.push(skipped(ctx, "visibility", "", "no sideband measured")),
    }
    // Saturation.
    match m.saturated_fraction {
        Some(s) => {
            let st = if s > th.saturation_fail_frac {
                Status::Fail
            } else if s > 0.0 {
                Status::Warn
            } else {
                Status::Pass
            };
            let t = if st == Status::Fail {
                th.saturation_fail_frac
            } else {
                0.0
            };
            let hint = if st == Status::Pass {
                "no saturated pixels".into()
            } else {
                format!("{:.4}% of pixels saturated: reduce the exposure or the beam power by about 20%", 100.0 * s)
            };
            out.push(item(
                ctx,
                "saturation",
                st,
                Some(s),
                Some(t),
                "fraction",
                hint,
            ));
        }
        None => out.push(skipped(ctx, "saturation", "fraction", "no frames")),
    }
    // Reference uniformity.
    match m.reference_uniformity {
        Some(u) => {
            let (st, t) = grade_low(u, th.uniformity_warn, th.uniformity_fail);
            let hint = if st == Status::Pass {
                format!("reference min/max {u:.2} over the signal")
            } else {
                format!("reference min/max {u:.2} over the signal: expand the reference beam or centre it on the fibre image")
            };
            out.push(item(
                ctx,
                "reference_uniformity",
                st,
                Some(u),
                Some(t),
                "min/max",
                hint,
            ));
        }
        None => out.push(skipped(
            ctx,
            "reference_uniformity",
            "min/max",
            "no reference frame (frames.reference)",
        )),
    }
    // Signal level.
    match (m.peak_counts, m.full_scale_counts) {
        (Some(p), Some(fs)) if fs > 0.0 => {
            let frac = p / fs;
            let (st, t) = grade_low(frac, th.level_warn_frac, th.level_fail_frac);
            let hint = if st == Status::Pass {
                format!("peak {p:.0} of {fs:.0} counts")
            } else {
                format!("peak {p:.0} of {fs:.0} counts: raise the exposure or power by about {:.0}x (aim at ~70% of full scale)", (0.7 / frac.max(1e-9)).min(1e4))
            };
            out.push(item(
                ctx,
                "signal_level",
                st,
                Some(frac),
                Some(t),
                "of full scale",
                hint,
            ));
        }
        _ => out.push(skipped(
            ctx,
            "signal_level",
            "of full scale",
            "full scale unknown",
        )),
    }
    // Centring.
    match m.centroid_um {
        Some(c) => {
            let r = (c[0] * c[0] + c[1] * c[1]).sqrt();
            let frac = r / ctx.core_radius_um;
            let (st, t) = grade_high(frac, th.centre_warn_frac, th.centre_fail_frac);
            let px = |um: f64| um * ctx.magnification / ctx.pixel_pitch_um;
            let dir = |v: f64, axis: &str, neg: &str, pos: &str| -> String {
                if v > 0.0 {
                    format!(
                        "{:.1} um ({:.1} px) towards -{axis} ({neg} on the camera)",
                        v,
                        px(v)
                    )
                } else {
                    format!(
                        "{:.1} um ({:.1} px) towards +{axis} ({pos} on the camera)",
                        -v,
                        px(-v)
                    )
                }
            };
            let hint = if st == Status::Pass {
                format!(
                    "centroid at ({:.2}, {:.2}) um from the region centre",
                    c[0], c[1]
                )
            } else {
                format!(
                    "the fibre image sits {r:.1} um ({:.0}% of the core radius) off the region centre: move it {} and {}, or shift the region by ({:.0}, {:.0}) px, or set center_um = [{:.2}, {:.2}]",
                    100.0 * frac,
                    dir(c[0], "x", "left", "right"),
                    dir(c[1], "y", "up", "down"),
                    px(c[0]),
                    px(c[1]),
                    c[0],
                    c[1]
                )
            };
            out.push(item(
                ctx,
                "centring",
                st,
                Some(frac),
                Some(t),
                "of core radius",
                hint,
            ));
        }
        None => out.push(skipped(ctx, "centring", "of core radius", "no field")),
    }
    // Focus.
    match m.defocus_um {
        Some(dz) => {
            let dof = ctx.wavelength_nm * 1e-3 / (ctx.na * ctx.na);
            let n = dz.abs() / dof;
            let (st, _) = grade_high(n, th.focus_warn_dof, th.focus_fail_dof);
            let t = if st == Status::Fail {
                th.focus_fail_dof
            } else {
                th.focus_warn_dof
            } * dof;
            let m2 = ctx.magnification * ctx.magnification;
            let hint = if st == Status::Pass {
                format!("imaged plane {dz:.1} um from the fibre face (depth of focus {dof:.1} um)")
            } else if dz > 0.0 {
                format!("the imaged plane is {dz:.1} um past the fibre face (downstream): move the fibre {dz:.1} um towards the lens, or the camera {:.0} um towards the lens (x M^2 = {m2:.0}), or set defocus_um = {dz:.2}", dz * m2)
            } else {
                format!("the imaged plane is {:.1} um before the fibre face (inside the fibre): move the fibre {:.1} um away from the lens, or the camera {:.0} um away from the lens (x M^2 = {m2:.0}), or set defocus_um = {dz:.2}", -dz, -dz, -dz * m2)
            };
            out.push(item(ctx, "focus", st, Some(dz), Some(t), "um", hint));
        }
        None => out.push(skipped(ctx, "focus", "um", "no field")),
    }
    // Captured power.
    match m.captured {
        Some(eta) => {
            let (st, t) = grade_low(eta, th.captured_warn, th.captured_fail);
            let hint = if st == Status::Pass {
                format!("{:.1}% of the power in the basis", 100.0 * eta)
            } else {
                format!("only {:.1}% of the power in the basis at the setup's alignment: run `modegram calibrate` (or fix the centring / focus items above)", 100.0 * eta)
            };
            out.push(item(
                ctx,
                "captured_power",
                st,
                Some(eta),
                Some(t),
                "fraction",
                hint,
            ));
        }
        None => out.push(skipped(
            ctx,
            "captured_power",
            "fraction",
            "no basis or field",
        )),
    }
    out
}

/// Worst status among the items (Pass for none).
pub fn worst(items: &[Item]) -> Status {
    items.iter().map(|i| i.status).max().unwrap_or(Status::Pass)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ctx() -> Context {
        Context {
            channel: "H".into(),
            core_radius_um: 25.0,
            wavelength_nm: 1064.0,
            na: 0.2,
            magnification: 20.0,
            pixel_pitch_um: 5.5,
            center_um: [0.0, 0.0],
            defocus_um: 0.0,
        }
    }

    fn good() -> Measured {
        Measured {
            carrier_cycles_per_px: Some([0.2, 0.15]),
            window_radius: Some(0.05),
            bandwidth: Some(0.05),
            sideband_to_dc: Some(0.2),
            beam_ratio: Some(1.5),
            saturated_fraction: Some(0.0),
            peak_counts: Some(40000.0),
            full_scale_counts: Some(65535.0),
            reference_uniformity: Some(0.8),
            centroid_um: Some([0.5, -0.3]),
            defocus_um: Some(1.0),
            captured: Some(0.97),
            dc_distance: None,
        }
    }

    fn status(items: &[Item], name: &str) -> Status {
        items.iter().find(|i| i.name == name).unwrap().status
    }

    #[test]
    fn good_setup_passes_every_item() {
        let items = evaluate(&good(), &ctx(), &Thresholds::default());
        assert_eq!(items.len(), 10);
        for i in &items {
            assert_eq!(i.status, Status::Pass, "{i:?}");
        }
    }

    /// Nyquist: 2 px per fringe (Picart 2015); 3 px common practice, no source.
    #[test]
    fn fringe_period_limits() {
        let th = Thresholds::default();
        let mut m = good();
        m.carrier_cycles_per_px = Some([0.3, 0.3]); // 2.36 px
        assert_eq!(
            status(&evaluate(&m, &ctx(), &th), "fringe_period"),
            Status::Warn
        );
        m.carrier_cycles_per_px = Some([0.45, 0.3]); // 1.85 px
        let items = evaluate(&m, &ctx(), &th);
        assert_eq!(status(&items, "fringe_period"), Status::Fail);
        assert!(
            items[0].hint.contains("reduce the angle"),
            "{}",
            items[0].hint
        );
        m.carrier_cycles_per_px = Some([0.25, 0.002]);
        assert_eq!(
            status(&evaluate(&m, &ctx(), &th), "fringe_angle"),
            Status::Warn
        );
    }

    /// Cuche et al. 2000: |c| >= 3B; with the window W around the carrier the DC order
    /// (radius 2B) is reached when |c| - W < 2B.
    #[test]
    fn separation_fails_when_window_overlaps_dc_order() {
        let th = Thresholds::default();
        let mut m = good();
        m.carrier_cycles_per_px = Some([0.12, 0.0]);
        m.window_radius = Some(0.05);
        m.bandwidth = Some(0.05); // margin (0.12 - 0.05) / 0.1 = 0.7
        let items = evaluate(&m, &ctx(), &th);
        let s = items.iter().find(|i| i.name == "separation").unwrap();
        assert_eq!(s.status, Status::Fail);
        assert!((s.value.unwrap() - 0.7).abs() < 1e-12);
        assert!(s.hint.contains("into the DC order"), "{}", s.hint);
        m.carrier_cycles_per_px = Some([0.16, 0.0]); // 1.1
        assert_eq!(
            status(&evaluate(&m, &ctx(), &th), "separation"),
            Status::Warn
        );
    }

    #[test]
    fn saturation_warn_and_fail() {
        let th = Thresholds::default();
        let mut m = good();
        m.saturated_fraction = Some(1e-5);
        assert_eq!(
            status(&evaluate(&m, &ctx(), &th), "saturation"),
            Status::Warn
        );
        m.saturated_fraction = Some(2e-3);
        assert_eq!(
            status(&evaluate(&m, &ctx(), &th), "saturation"),
            Status::Fail
        );
    }

    #[test]
    fn centring_hint_names_direction_and_amount() {
        let mut m = good();
        m.centroid_um = Some([3.2 + 0.0, -5.0]);
        let items = evaluate(&m, &ctx(), &Thresholds::default());
        let c = items.iter().find(|i| i.name == "centring").unwrap();
        // 5.94 um of 25 um = 24%: warn
        assert_eq!(c.status, Status::Warn);
        assert!(
            c.hint
                .contains("3.2 um (11.6 px) towards -x (left on the camera)"),
            "{}",
            c.hint
        );
        assert!(
            c.hint.contains("towards +y (down on the camera)"),
            "{}",
            c.hint
        );
        assert!(c.hint.contains("center_um = [3.20, -5.00]"), "{}", c.hint);
        m.centroid_um = Some([8.0, 0.0]);
        assert_eq!(
            status(&evaluate(&m, &ctx(), &Thresholds::default()), "centring"),
            Status::Fail
        );
    }

    #[test]
    fn focus_hint_converts_to_axial_moves() {
        let mut m = good();
        // depth of focus 1.064 / 0.04 = 26.6 um; 12 um passes, 40 um warns, 100 um fails.
        m.defocus_um = Some(40.0);
        let items = evaluate(&m, &ctx(), &Thresholds::default());
        let f = items.iter().find(|i| i.name == "focus").unwrap();
        assert_eq!(f.status, Status::Warn);
        assert!(f.hint.contains("40.0 um past the fibre face"), "{}", f.hint);
        assert!(
            f.hint.contains("camera 16000 um towards the lens"),
            "{}",
            f.hint
        );
        m.defocus_um = Some(-100.0);
        let items = evaluate(&m, &ctx(), &Thresholds::default());
        let f = items.iter().find(|i| i.name == "focus").unwrap();
        assert_eq!(f.status, Status::Fail);
        assert!(f.hint.contains("away from the lens"), "{}", f.hint);
    }

    #[test]
    fn level_visibility_uniformity_and_captured() {
        let th = Thresholds::default();
        let mut m = good();
        m.peak_counts = Some(3000.0);
        m.sideband_to_dc = Some(0.001); // V = 0.063
        m.beam_ratio = Some(50.0);
        m.reference_uniformity = Some(0.3);
        m.captured = Some(0.6);
        let items = evaluate(&m, &ctx(), &th);
        assert_eq!(status(&items, "signal_level"), Status::Warn);
        assert_eq!(status(&items, "visibility"), Status::Fail);
        assert!(items
            .iter()
            .any(|i| i.hint.contains("attenuate it by about 50.0x")));
        assert_eq!(status(&items, "reference_uniformity"), Status::Warn);
        assert_eq!(status(&items, "captured_power"), Status::Fail);
        assert_eq!(worst(&items), Status::Fail);
        m.reference_uniformity = None;
        assert_eq!(
            status(&evaluate(&m, &ctx(), &th), "reference_uniformity"),
            Status::Skip
        );
    }
}
