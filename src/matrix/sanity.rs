//! Sanity of a decoded launch sequence before it becomes a matrix: the mistakes that give a
//! plausible-looking but wrong matrix with exit status 0.
//!
//! Contract: [`sequence_problems`] takes the decoded coefficients, field powers and captured
//! fractions with the launch layout and returns one message per problem, naming the frames
//! (0-based) and the figures; empty when the sequence looks like a launch sequence. The
//! callers (`run`, `matrix`) print them and exit 1 (results are still written).
//!
//! Checks (thresholds: common practice, no source):
//! - signal: a launch frame whose field power is below 2 % of the median launch frame's
//!   (a dark or blocked frame in a launch slot);
//! - channel: a channel whose median captured fraction is below 0.5 (no sideband at its
//!   carrier, or a basis that does not describe the light), and launch frames captured
//!   below half the channel's median;
//! - distinct launches: two consecutive inputs whose output coefficient vectors are parallel
//!   to 0.98 (a device's columns are near orthogonal; equal frames mean the launcher did not
//!   move, or the same file was recorded twice);
//! - references: a reference frame whose output is not parallel (0.9) to the output of the
//!   input it repeats (references in the wrong slots, or no references at all).
use super::launch::{FrameRole, LaunchLayout};
use crate::decode::Decoded;
use ndarray::{ArrayView1, Axis};
use num_complex::Complex64;

/// Below this share of the median launch power a frame holds no launch.
pub const MIN_SIGNAL_SHARE: f64 = 0.02;
/// Below this median captured fraction a channel is not decoding its light.
pub const MIN_CHANNEL_CAPTURED: f64 = 0.5;
/// Consecutive inputs more parallel than this are the same launch.
pub const SAME_LAUNCH: f64 = 0.98;
/// A reference frame less parallel than this to its input is not that input.
pub const MIN_REFERENCE_SIMILARITY: f64 = 0.9;

fn median(mut v: Vec<f64>) -> f64 {
    if v.is_empty() {
        return 0.0;
    }
    let mid = v.len() / 2;
    *v.select_nth_unstable_by(mid, |a, b| a.total_cmp(b)).1
}

/// |<a, b>| / (|a| |b|) of two coefficient vectors (0 when either is zero).
fn similarity(a: ArrayView1<Complex64>, b: ArrayView1<Complex64>) -> f64 {
    let ip: Complex64 = a.iter().zip(b.iter()).map(|(x, y)| x.conj() * y).sum();
    let na: f64 = a.iter().map(|z| z.norm_sqr()).sum();
    let nb: f64 = b.iter().map(|z| z.norm_sqr()).sum();
    if na > 0.0 && nb > 0.0 {
        ip.norm() / (na * nb).sqrt()
    } else {
        0.0
    }
}

/// Frame list for a message: "3, 7, 12" (at most 12, then "... (N in all)").
fn list(frames: &[usize]) -> String {
    let mut s: Vec<String> = frames.iter().take(12).map(|f| f.to_string()).collect();
    if frames.len() > 12 {
        s.push(format!("... ({} in all)", frames.len()));
    }
    s.join(", ")
}

/// Problems of a decoded launch sequence; see the module header.
pub fn sequence_problems(d: &Decoded, layout: &LaunchLayout) -> Vec<String> {
    let mut out = Vec::new();
    let (nf, nc, _) = d.coefficients.dim();
    if nf == 0 || nf != layout.roles.len() {
        return out;
    }
    let launches: Vec<usize> = (0..nf)
        .filter(|&f| matches!(layout.roles[f], FrameRole::Input { .. }))
        .collect();
    let power = |f: usize| d.field_power.row(f).sum();
    let med = median(launches.iter().map(|&f| power(f)).collect());
    if med > 0.0 {
        let weak: Vec<usize> = launches
            .iter()
            .copied()
            .filter(|&f| power(f) < MIN_SIGNAL_SHARE * med)
            .collect();
        if !weak.is_empty() {
            out.push(format!(
                "frames {} hold almost no signal (below {:.0} % of the median launch frame's \
                 field power): a dark or blocked frame in a launch slot?",
                list(&weak),
                100.0 * MIN_SIGNAL_SHARE
            ));
        }
    }
    for (c, info) in d.channels.iter().enumerate() {
        let cap: Vec<f64> = launches.iter().map(|&f| d.captured[[f, c]]).collect();
        if cap.iter().all(|&v| v == 0.0) {
            continue; // decoded without a basis
        }
        let m = median(cap.clone());
        if m < MIN_CHANNEL_CAPTURED {
            out.push(format!(
                "channel {}: the basis captures a median {:.3} of the light (below {}): no \
                 sideband at its carrier, or a basis or alignment that does not describe the \
                 light",
                info.name, m, MIN_CHANNEL_CAPTURED
            ));
        } else {
            let low: Vec<usize> = launches
                .iter()
                .zip(&cap)
                .filter(|(f, &v)| v < 0.5 * m && power(**f) >= MIN_SIGNAL_SHARE * med)
                .map(|(&f, _)| f)
                .collect();
            if !low.is_empty() {
                out.push(format!(
                    "channel {}: frames {} capture less than half the channel's median {:.3}",
                    info.name,
                    list(&low),
                    m
                ));
            }
        }
    }
    // One vector per frame over every channel's coefficients.
    let vec_of = |f: usize| {
        d.coefficients
            .index_axis(Axis(0), f)
            .iter()
            .copied()
            .collect::<ndarray::Array1<Complex64>>()
    };
    let firsts: Vec<usize> = layout
        .input_frames
        .iter()
        .filter_map(|v| v.first().copied())
        .collect();
    let mut same = Vec::new();
    for w in firsts.windows(2) {
        let s = similarity(vec_of(w[0]).view(), vec_of(w[1]).view());
        if s > SAME_LAUNCH {
            same.push(format!("{} and {}", w[0], w[1]));
        }
    }
    if !same.is_empty() {
        let n = same.len();
        same.truncate(8);
        out.push(format!(
            "consecutive launches give the same output (similarity above {SAME_LAUNCH}): frames \
             {}{}; the launcher did not change mode, or one frame was recorded twice",
            same.join("; "),
            if n > 8 {
                format!(" ... ({n} pairs in all)")
            } else {
                String::new()
            }
        ));
    }
    if let Some(target) = layout.input_frames.get(layout.reference_input) {
        if let Some(&t) = target.first() {
            let bad: Vec<(usize, f64)> = layout
                .reference_frames
                .iter()
                .map(|&r| {
                    // per channel (each channel's reference phase drifts on its own)
                    let s = (0..nc)
                        .map(|c| {
                            similarity(
                                d.coefficients.index_axis(Axis(0), r).row(c),
                                d.coefficients.index_axis(Axis(0), t).row(c),
                            )
                        })
                        .fold(f64::INFINITY, f64::min);
                    (r, s)
                })
                .filter(|&(_, s)| s < MIN_REFERENCE_SIMILARITY)
                .collect();
            if !bad.is_empty() {
                let frames: Vec<usize> = bad.iter().map(|b| b.0).collect();
                let worst = bad.iter().map(|b| b.1).fold(f64::INFINITY, f64::min);
                out.push(format!(
                    "reference frames {} do not repeat the launch of input {} (frame {t}): \
                     similarity down to {worst:.3}, below {MIN_REFERENCE_SIMILARITY}; are the \
                     references in the slots launch.reference_every says?",
                    list(&frames),
                    layout.reference_input
                ));
            }
        }
    }
    out
}
