//! The scenario file (TOML, `version = 1`): everything `modegram synth` simulates.
//!
//! The sections `[light]`, `[camera]`, `[fiber]` and `[basis]` are the setup file's own
//! types (crate::setup), so a scenario and the setup it produces describe the same fibre.
//! The rest is the simulator's: `[sensor]` (frame size, bit depth, gain, noise levels),
//! `[[channel]]` (region, magnification, the TRUE misalignment, the reference beam, signal
//! power), `[transfer]` (random or from NPY), `[launch]`, `[noise]` (on/off switches) and
//! `[drift]`. Every key, with unit and default, is documented in docs/scenario.md.
//! [`Scenario::load`] parses (unknown keys are errors) and validates every value, naming key
//! and value in the error.
use crate::error::{Error, Result};
use crate::grid::Alignment;
use crate::matrix::PolMixing;
use crate::setup::{BasisSpec, Camera, Fiber, Light};
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// A whole scenario file.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Scenario {
    pub version: u32,
    /// Seed of every random draw (truth matrix, drift, noise).
    #[serde(default)]
    pub seed: u64,
    pub light: Light,
    pub camera: Camera,
    pub fiber: Fiber,
    #[serde(default)]
    pub basis: BasisSpec,
    pub sensor: Sensor,
    #[serde(rename = "channel")]
    pub channels: Vec<SynthChannel>,
    #[serde(default)]
    pub transfer: Transfer,
    #[serde(default)]
    pub launch: SynthLaunch,
    #[serde(default)]
    pub noise: Noise,
    #[serde(default)]
    pub drift: Drift,
    /// Folder of the scenario file (paths resolve against it). Not a TOML key.
    #[serde(skip)]
    pub dir: PathBuf,
    /// The scenario file itself (for messages). Not a TOML key.
    #[serde(skip)]
    pub file: PathBuf,
}

/// The camera's sensor beyond what the setup file needs.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Sensor {
    /// Frame width, pixels.
    pub width_px: usize,
    /// Frame height, pixels.
    pub height_px: usize,
    /// Bits per pixel of the written frames: 8 or 16.
    #[serde(default = "sixteen")]
    pub bit_depth: u32,
    /// Electrons per count (conversion gain), for shot noise.
    #[serde(default = "default_gain")]
    pub gain_e_per_count: f64,
    /// Read noise, counts rms.
    #[serde(default = "default_read_noise")]
    pub read_noise_counts: f64,
    /// Dark offset (bias) added to every pixel, counts.
    #[serde(default = "default_dark")]
    pub dark_offset_counts: f64,
    /// Quadrature points per pixel axis for the pixel-aperture integral (1 to 5).
    #[serde(default = "four")]
    pub subpixels: usize,
}

/// One output channel: where it sits on the camera, its true misalignment, its reference.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SynthChannel {
    pub name: String,
    /// x0, y0, width, height in camera pixels.
    pub region: [usize; 4],
    /// Nominal fibre plane -> camera plane magnification.
    pub magnification: f64,
    /// Counts (summed over the region) the signal alone gives per unit launched power
    /// reaching this channel.
    pub signal_counts: f64,
    /// TRUE fibre-axis position from the region's centre pixel, fibre-plane micrometres.
    #[serde(default)]
    pub center_um: [f64; 2],
    /// TRUE rotation, degrees from +x towards +y.
    #[serde(default)]
    pub rotation_deg: f64,
    /// TRUE magnification correction.
    #[serde(default = "crate::setup::one")]
    pub scale: f64,
    /// TRUE residual tilt of the signal, milliradians (fibre plane).
    #[serde(default)]
    pub tilt_mrad: [f64; 2],
    /// TRUE defocus: the imaged plane lies this far downstream of the fibre face, micrometres.
    #[serde(default)]
    pub defocus_um: f64,
    /// Position of the signal's sideband, cycles per pixel; the reference beam is
    /// R = |R| exp(+i 2 pi f_R . r) with f_R = -carrier (docs/conventions.md).
    pub carrier: [f64; 2],
    /// Gaussian waist (1/e field radius) of the reference beam on the camera, pixels.
    #[serde(default = "default_ref_waist")]
    pub reference_waist_px: f64,
    /// Centre of the reference beam from the region's centre pixel, pixels.
    #[serde(default)]
    pub reference_offset_px: [f64; 2],
    /// Reference intensity at its centre, counts.
    pub reference_peak_counts: f64,
}

impl SynthChannel {
    /// The channel's true alignment.
    pub fn alignment(&self) -> Alignment {
        Alignment {
            center_um: self.center_um,
            rotation_deg: self.rotation_deg,
            scale: self.scale,
            tilt_mrad: self.tilt_mrad,
            defocus_um: self.defocus_um,
        }
    }
}

/// Where the transfer matrix comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum TransferKind {
    #[default]
    Random,
    File,
}

/// The device's transfer matrix.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Transfer {
    #[serde(default)]
    pub kind: TransferKind,
    /// Mode-dependent loss, dB (20 log10 s_max / s_min).
    #[serde(default)]
    pub mdl_db: f64,
    /// Mean insertion loss, dB (-10 log10 mean s^2).
    #[serde(default)]
    pub insertion_loss_db: f64,
    /// Power leaving the input's mode group over power staying, dB (e.g. -20); omitted: none.
    #[serde(default)]
    pub group_crosstalk_db: Option<f64>,
    /// "none" (input polarisation p reaches channel p only), "rotation" (a random
    /// polarisation rotation per group) or "full" (one Haar block over both polarisations).
    #[serde(default)]
    pub pol_mixing: PolMixing,
    /// kind = "file": complex128 NPY of shape (channels * modes, polarizations * modes).
    #[serde(default)]
    pub file: Option<PathBuf>,
}

impl Default for Transfer {
    fn default() -> Self {
        Transfer {
            kind: TransferKind::Random,
            mdl_db: 0.0,
            insertion_loss_db: 0.0,
            group_crosstalk_db: None,
            pol_mixing: PolMixing::Full,
            file: None,
        }
    }
}

/// The launch sequence; same meaning as the setup's `[launch]` (docs/conventions.md).
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct SynthLaunch {
    #[serde(default = "crate::setup::default_pols")]
    pub polarizations: Vec<String>,
    #[serde(default)]
    pub reference_every: usize,
    #[serde(default)]
    pub reference_input: usize,
    #[serde(default = "crate::setup::one_usize")]
    pub repeats: usize,
}

impl Default for SynthLaunch {
    fn default() -> Self {
        SynthLaunch {
            polarizations: crate::setup::default_pols(),
            reference_every: 0,
            reference_input: 0,
            repeats: 1,
        }
    }
}

/// Which noise sources are on.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Noise {
    /// Poisson noise of the photo-electrons.
    #[serde(default = "crate::setup::yes")]
    pub shot: bool,
    /// Gaussian read noise of `sensor.read_noise_counts`.
    #[serde(default = "crate::setup::yes")]
    pub read: bool,
    /// Round to integer counts and write TIFF; off: float frames written as NPY.
    #[serde(default = "crate::setup::yes")]
    pub quantisation: bool,
    /// Clip at `camera.saturation_counts` (default the format's maximum).
    #[serde(default = "crate::setup::yes")]
    pub saturation: bool,
    /// dark.tif / reference.tif: 0 = the noise-free expectation; N = the mean of N noisy frames.
    #[serde(default)]
    pub calibration_averages: usize,
}

impl Default for Noise {
    fn default() -> Self {
        Noise {
            shot: true,
            read: true,
            quantisation: true,
            saturation: true,
            calibration_averages: 0,
        }
    }
}

/// Phase drift of the reference relative to the signal, from frame to frame.
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Drift {
    /// Standard deviation of the random-walk step between consecutive frames, radians.
    #[serde(default)]
    pub step_rad: f64,
    /// Linear drift per frame, radians.
    #[serde(default)]
    pub rate_rad_per_frame: f64,
}

fn four() -> usize {
    4
}
fn sixteen() -> u32 {
    16
}
fn default_gain() -> f64 {
    0.5
}
fn default_read_noise() -> f64 {
    3.0
}
fn default_dark() -> f64 {
    100.0
}
fn default_ref_waist() -> f64 {
    1.0e6
}

impl Scenario {
    /// Read, parse and validate a scenario file.
    pub fn load(path: &Path) -> Result<Scenario> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        Scenario::from_toml(&text, path)
    }

    /// Parse and validate scenario text as if read from `path`.
    pub fn from_toml(text: &str, path: &Path) -> Result<Scenario> {
        let (mut s, dir): (Scenario, PathBuf) = crate::setup::parse_toml(text, path)?;
        s.file = path.to_path_buf();
        s.dir = dir;
        s.validate()?;
        Ok(s)
    }

    /// A path from the scenario, resolved against its folder.
    pub fn resolve(&self, p: &Path) -> PathBuf {
        if p.is_absolute() {
            p.to_path_buf()
        } else {
            self.dir.join(p)
        }
    }

    /// Largest count the frame format holds.
    pub fn max_code(&self) -> f64 {
        ((1u64 << self.sensor.bit_depth) - 1) as f64
    }

    /// Counts at which pixels clip.
    pub fn saturation_counts(&self) -> f64 {
        if self.noise.saturation {
            self.camera
                .saturation_counts
                .unwrap_or(self.max_code())
                .min(self.max_code())
        } else {
            self.max_code()
        }
    }

    /// A setup with this scenario's fibre, light, camera and basis (no channels, no frames),
    /// for solving the mode basis and for checking the shared sections with the setup's rules.
    pub fn bare_setup(&self) -> crate::setup::Setup {
        crate::setup::Setup {
            version: 1,
            light: self.light.clone(),
            camera: self.camera.clone(),
            fiber: self.fiber.clone(),
            basis: self.basis.clone(),
            frames: Default::default(),
            channels: Vec::new(),
            launch: Default::default(),
            decode: Default::default(),
            dir: self.dir.clone(),
            file: self.file.clone(),
        }
    }

    /// Check every value; errors name the key and the value.
    pub fn validate(&self) -> Result<()> {
        let f = self.file.display().to_string();
        let f = f.as_str();
        if self.version != 1 {
            return Err(Error::setup(
                f,
                "version",
                self.version,
                "only version 1 is known",
            ));
        }
        // The shared sections follow the setup file's rules.
        self.bare_setup().validate()?;
        self.validate_sensor(f)?;
        if self.channels.is_empty() {
            return Err(Error::setup(
                f,
                "channel",
                "[]",
                "give at least one [[channel]]",
            ));
        }
        for i in 0..self.channels.len() {
            self.validate_channel(f, i)?;
        }
        self.validate_transfer(f)?;
        let l = &self.launch;
        if l.polarizations.is_empty() {
            return Err(Error::setup(
                f,
                "launch.polarizations",
                "[]",
                "name at least one input polarisation",
            ));
        }
        if l.repeats == 0 {
            return Err(Error::setup(f, "launch.repeats", 0, "must be at least 1"));
        }
        for (key, v) in [
            ("drift.step_rad", self.drift.step_rad),
            ("drift.rate_rad_per_frame", self.drift.rate_rad_per_frame),
        ] {
            if !v.is_finite() || (key == "drift.step_rad" && v < 0.0) {
                return Err(Error::setup(
                    f,
                    key,
                    v,
                    "must be a finite number (step >= 0)",
                ));
            }
        }
        Ok(())
    }

    fn validate_sensor(&self, f: &str) -> Result<()> {
        let s = &self.sensor;
        if s.width_px < 8 || s.width_px > 1 << 15 {
            return Err(Error::setup(
                f,
                "sensor.width_px",
                s.width_px,
                "must be 8 to 32768",
            ));
        }
        if s.height_px < 8 || s.height_px > 1 << 15 {
            return Err(Error::setup(
                f,
                "sensor.height_px",
                s.height_px,
                "must be 8 to 32768",
            ));
        }
        if s.bit_depth != 8 && s.bit_depth != 16 {
            return Err(Error::setup(
                f,
                "sensor.bit_depth",
                s.bit_depth,
                "must be 8 or 16",
            ));
        }
        if !(s.gain_e_per_count.is_finite() && s.gain_e_per_count > 0.0) {
            return Err(Error::setup(
                f,
                "sensor.gain_e_per_count",
                s.gain_e_per_count,
                "must be a finite number > 0",
            ));
        }
        if !(s.read_noise_counts.is_finite() && s.read_noise_counts >= 0.0) {
            return Err(Error::setup(
                f,
                "sensor.read_noise_counts",
                s.read_noise_counts,
                "must be a finite number >= 0",
            ));
        }
        if !(s.dark_offset_counts.is_finite()
            && s.dark_offset_counts >= 0.0
            && s.dark_offset_counts < self.max_code())
        {
            return Err(Error::setup(
                f,
                "sensor.dark_offset_counts",
                s.dark_offset_counts,
                format!(
                    "must be in [0, {}) for {}-bit frames",
                    self.max_code(),
                    s.bit_depth
                ),
            ));
        }
        if !(1..=5).contains(&s.subpixels) {
            return Err(Error::setup(
                f,
                "sensor.subpixels",
                s.subpixels,
                "must be 1 to 5",
            ));
        }
        Ok(())
    }

    fn validate_channel(&self, f: &str, i: usize) -> Result<()> {
        let ch = &self.channels[i];
        let k = |name: &str| format!("channel[{i}].{name}");
        if ch.name.is_empty() || self.channels[..i].iter().any(|c| c.name == ch.name) {
            return Err(Error::setup(
                f,
                k("name"),
                format!("{:?}", ch.name),
                "must be a non-empty name used by one channel only",
            ));
        }
        let [x0, y0, w, h] = ch.region;
        if w < 8 || h < 8 || x0 + w > self.sensor.width_px || y0 + h > self.sensor.height_px {
            return Err(Error::setup(
                f,
                k("region"),
                format!("{:?}", ch.region),
                format!(
                    "must be at least 8 x 8 pixels and inside the {} x {} frame",
                    self.sensor.width_px, self.sensor.height_px
                ),
            ));
        }
        for (j, o) in self.channels[..i].iter().enumerate() {
            let [a0, b0, aw, bh] = o.region;
            if x0 < a0 + aw && a0 < x0 + w && y0 < b0 + bh && b0 < y0 + h {
                return Err(Error::setup(
                    f,
                    k("region"),
                    format!("{:?}", ch.region),
                    format!("overlaps channel[{j}].region {:?}", o.region),
                ));
            }
        }
        for (key, v) in [
            ("magnification", ch.magnification),
            ("scale", ch.scale),
            ("signal_counts", ch.signal_counts),
            ("reference_peak_counts", ch.reference_peak_counts),
            ("reference_waist_px", ch.reference_waist_px),
        ] {
            if !(v.is_finite() && v > 0.0) {
                return Err(Error::setup(f, k(key), v, "must be a finite number > 0"));
            }
        }
        let c = ch.carrier;
        if !(c[0].is_finite() && c[1].is_finite())
            || c[0].abs() >= 0.5
            || c[1].abs() >= 0.5
            || (c[0] == 0.0 && c[1] == 0.0)
        {
            return Err(Error::setup(
                f,
                k("carrier"),
                format!("{c:?}"),
                "each component must be inside (-0.5, 0.5) cycles per pixel (Nyquist), not both 0",
            ));
        }
        for (key, v) in [
            ("center_um", ch.center_um[0]),
            ("center_um", ch.center_um[1]),
            ("rotation_deg", ch.rotation_deg),
            ("tilt_mrad", ch.tilt_mrad[0]),
            ("tilt_mrad", ch.tilt_mrad[1]),
            ("defocus_um", ch.defocus_um),
            ("reference_offset_px", ch.reference_offset_px[0]),
            ("reference_offset_px", ch.reference_offset_px[1]),
        ] {
            if !v.is_finite() {
                return Err(Error::setup(f, k(key), v, "must be a finite number"));
            }
        }
        // A tilt so steep that the phase wraps faster than the camera samples it.
        let pitch_um = self.camera.pixel_pitch_um / ch.magnification;
        let lambda_um = self.light.wavelength_nm * 1e-3;
        for t in ch.tilt_mrad {
            let cycles_per_px = (t * 1e-3).abs() * pitch_um / lambda_um;
            if cycles_per_px >= 0.25 {
                return Err(Error::setup(
                    f,
                    k("tilt_mrad"),
                    format!("{:?}", ch.tilt_mrad),
                    "tilts the signal by 0.25 cycles per pixel or more",
                ));
            }
        }
        Ok(())
    }

    fn validate_transfer(&self, f: &str) -> Result<()> {
        let t = &self.transfer;
        if !(t.mdl_db.is_finite() && t.mdl_db >= 0.0 && t.mdl_db <= 60.0) {
            return Err(Error::setup(
                f,
                "transfer.mdl_db",
                t.mdl_db,
                "must be in [0, 60] dB",
            ));
        }
        if !(t.insertion_loss_db.is_finite() && t.insertion_loss_db >= 0.0) {
            return Err(Error::setup(
                f,
                "transfer.insertion_loss_db",
                t.insertion_loss_db,
                "must be a finite number >= 0 dB",
            ));
        }
        if let Some(x) = t.group_crosstalk_db {
            if !(x.is_finite() && (-80.0..=-1.0).contains(&x)) {
                return Err(Error::setup(
                    f,
                    "transfer.group_crosstalk_db",
                    x,
                    "must be in [-80, -1] dB (omit the key for none)",
                ));
            }
        }
        let (nc, np) = (self.channels.len(), self.launch.polarizations.len());
        if t.pol_mixing != PolMixing::Full && nc != np {
            return Err(Error::setup(
                f,
                "transfer.pol_mixing",
                format!("{:?}", t.pol_mixing).to_lowercase(),
                format!("needs as many channels as polarizations ({nc} and {np}); use \"full\""),
            ));
        }
        match (t.kind, &t.file) {
            (TransferKind::File, None) => Err(Error::setup(
                f,
                "transfer.file",
                "(missing)",
                "kind = \"file\" needs an NPY file of the matrix",
            )),
            (TransferKind::Random, Some(p)) => Err(Error::setup(
                f,
                "transfer.file",
                p.display(),
                "only used with kind = \"file\"",
            )),
            _ => Ok(()),
        }
    }
}
