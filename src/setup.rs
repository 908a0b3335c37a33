//! The setup file (TOML, `version = 1`): what was measured and how to decode it.
//!
//! The core keys are fixed by shared/interface.md; every key, with unit and default, is
//! documented in docs/setup.md. [`Setup::load`] parses (unknown keys are errors), resolves
//! paths relative to the setup file and validates every value, naming key and value in the
//! error.
use crate::error::{Error, Result};
use crate::grid::Alignment;
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

/// A whole setup file.
#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Setup {
    pub version: u32,
    pub light: Light,
    pub camera: Camera,
    pub fiber: Fiber,
    #[serde(default)]
    pub basis: BasisSpec,
    #[serde(default)]
    pub frames: FramesSpec,
    #[serde(default, rename = "channel")]
    pub channels: Vec<ChannelSpec>,
    #[serde(default)]
    pub launch: LaunchSpec,
    #[serde(default)]
    pub decode: DecodeSpec,
    /// Folder of the setup file; relative paths are resolved against it. Not a TOML key.
    #[serde(skip)]
    pub dir: PathBuf,
    /// The setup file itself (for messages). Not a TOML key.
    #[serde(skip)]
    pub file: PathBuf,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Light {
    /// Vacuum wavelength, nanometres.
    pub wavelength_nm: f64,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Camera {
    /// Camera pixel pitch, micrometres.
    pub pixel_pitch_um: f64,
    /// Light-sensitive fraction of the pixel's width (pixel-aperture correction), 0 < f <= 1.
    #[serde(default = "one")]
    pub fill_factor: f64,
    /// Counts at which a pixel is saturated; default: the frame format's maximum.
    #[serde(default)]
    pub saturation_counts: Option<f64>,
}

/// Index profile kind.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ProfileKind {
    Step,
    Graded,
    Table,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Fiber {
    pub profile: ProfileKind,
    /// Core radius, micrometres (step, graded; for table the radius where the profile
    /// meets the cladding, default: the last table radius).
    #[serde(default)]
    pub core_radius_um: Option<f64>,
    /// Numerical aperture sqrt(n_core^2 - n_clad^2); give this or `core_index`.
    #[serde(default)]
    pub na: Option<f64>,
    /// Peak core index; give this or `na`.
    #[serde(default)]
    pub core_index: Option<f64>,
    /// Cladding index.
    #[serde(default = "default_cladding_index")]
    pub cladding_index: f64,
    /// Power-law exponent of the graded profile (2 = parabolic).
    #[serde(default = "two")]
    pub alpha: f64,
    /// Profile table (CSV with columns radius_um,index), relative to the setup file.
    #[serde(default)]
    pub table: Option<PathBuf>,
    /// Radial grid points per core radius of the finite-difference solver.
    #[serde(default = "default_points_per_radius")]
    pub solver_points_per_radius: usize,
    /// Outer boundary of the solver's radial grid, in core radii.
    #[serde(default = "default_solver_extent")]
    pub solver_extent_radii: f64,
    /// A mode whose normalised propagation constant b is below this is flagged near cut-off.
    #[serde(default = "default_cutoff_margin_b")]
    pub cutoff_margin_b: f64,
}

/// Basis kind.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum BasisKind {
    #[default]
    Lp,
    Lg,
    Hg,
}

#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BasisSpec {
    #[serde(default)]
    pub kind: BasisKind,
    /// Keep the first N mode groups; omitted: every guided group (lp) / required (lg, hg).
    #[serde(default)]
    pub groups: Option<usize>,
    /// Gaussian waist (1/e field radius), micrometres, lg / hg only; default: the
    /// fundamental-mode width of the fibre's parabolic fit.
    #[serde(default)]
    pub waist_um: Option<f64>,
    /// Circular (+l / -l, exp(+-i l phi)) instead of cos/sin azimuthal functions.
    #[serde(default)]
    pub circular: bool,
    /// Drop modes flagged near cut-off from the basis.
    #[serde(default)]
    pub drop_near_cutoff: bool,
}

impl Default for BasisSpec {
    fn default() -> Self {
        BasisSpec {
            kind: BasisKind::Lp,
            groups: None,
            waist_um: None,
            circular: false,
            drop_near_cutoff: false,
        }
    }
}

#[derive(Debug, Clone, Default, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FramesSpec {
    /// The launch sequence (TIFF, PNG or NPY), one frame per launch in launch order.
    #[serde(default)]
    pub stack: Option<PathBuf>,
    /// Camera dark frame (subtracted from every frame).
    #[serde(default)]
    pub dark: Option<PathBuf>,
    /// The reference beam alone (|R|^2: subtracted before the FFT, and its amplitude
    /// gives the field its absolute scale).
    #[serde(default)]
    pub reference: Option<PathBuf>,
}

/// "auto" or a value.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(untagged)]
pub enum AutoOr<T> {
    Auto(String),
    Value(T),
}

impl<'de, T: serde::de::DeserializeOwned> Deserialize<'de> for AutoOr<T> {
    /// A string (checked later to be "auto") or the value; a wrong value says what it
    /// takes instead of naming a Rust type.
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> std::result::Result<Self, D::Error> {
        use serde::de::Error as _;
        let v = toml::Value::deserialize(d)?;
        match v {
            toml::Value::String(s) => Ok(AutoOr::Auto(s)),
            other => {
                let shown = other.to_string();
                T::deserialize(other).map(AutoOr::Value).map_err(|e| {
                    D::Error::custom(format!(
                        "expected \"auto\" or a value, got {shown}: {}",
                        e.message()
                    ))
                })
            }
        }
    }
}

impl<T> Default for AutoOr<T> {
    fn default() -> Self {
        AutoOr::Auto("auto".into())
    }
}

impl<T: Clone> AutoOr<T> {
    /// The given value, or None for "auto".
    pub fn value(&self) -> Option<T> {
        match self {
            AutoOr::Auto(_) => None,
            AutoOr::Value(v) => Some(v.clone()),
        }
    }
}

#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ChannelSpec {
    pub name: String,
    /// x0, y0, width, height in camera pixels.
    pub region: [usize; 4],
    /// Fibre plane -> camera plane magnification.
    pub magnification: f64,
    /// "auto" or [fx, fy] in cycles per pixel: where the sideband holding the signal sits.
    #[serde(default)]
    pub carrier: AutoOr<[f64; 2]>,
    /// Alternative to `carrier`: fringe period in pixels ...
    #[serde(default)]
    pub carrier_period_px: Option<f64>,
    /// ... and direction of the sideband from +x towards +y, degrees.
    #[serde(default)]
    pub carrier_angle_deg: Option<f64>,
    /// Take the mirrored sideband (-carrier) for auto detection: flips which order is the
    /// signal when the reference is tilted the other way.
    #[serde(default)]
    pub conjugate: bool,
    /// "auto" or the window radius in cycles per pixel.
    #[serde(default)]
    pub window_radius: AutoOr<f64>,
    #[serde(default)]
    pub center_um: [f64; 2],
    #[serde(default)]
    pub rotation_deg: f64,
    /// Magnification correction (true magnification = magnification * scale).
    #[serde(default = "one")]
    pub scale: f64,
    #[serde(default)]
    pub tilt_mrad: [f64; 2],
    #[serde(default)]
    pub defocus_um: f64,
}

impl ChannelSpec {
    /// The channel's alignment as the decoder and the basis sampling use it.
    pub fn alignment(&self) -> Alignment {
        Alignment {
            center_um: self.center_um,
            rotation_deg: self.rotation_deg,
            scale: self.scale,
            tilt_mrad: self.tilt_mrad,
            defocus_um: self.defocus_um,
        }
    }

    /// The given carrier in cycles per pixel (from `carrier` or period and angle), None for auto.
    pub fn carrier_cycles_per_px(&self) -> Option<[f64; 2]> {
        if let (Some(p), Some(a)) = (self.carrier_period_px, self.carrier_angle_deg) {
            let (s, c) = a.to_radians().sin_cos();
            return Some([c / p, s / p]);
        }
        self.carrier.value()
    }

    /// Fibre-plane pitch of the camera pixels, micrometres.
    pub fn fibre_pitch_um(&self, camera: &Camera) -> f64 {
        camera.pixel_pitch_um / self.magnification
    }
}

#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct LaunchSpec {
    /// Input polarisations, outer loop; every basis mode inside it.
    #[serde(default = "default_pols")]
    pub polarizations: Vec<String>,
    /// A reference launch before every K inputs and one after the last (0: none).
    #[serde(default)]
    pub reference_every: usize,
    /// Which input (column index) the reference launches repeat.
    #[serde(default)]
    pub reference_input: usize,
    /// Consecutive repeats of each input launch (reference launches are single frames).
    #[serde(default = "one_usize")]
    pub repeats: usize,
    /// Counts the signal alone gives for one unit of launched power (0: relative IL).
    #[serde(default)]
    pub power_counts: f64,
    /// A back-to-back matrix (NPY, taken without the device) to normalise the loss by.
    #[serde(default)]
    pub back_to_back: Option<PathBuf>,
}

impl Default for LaunchSpec {
    fn default() -> Self {
        LaunchSpec {
            polarizations: default_pols(),
            reference_every: 0,
            reference_input: 0,
            repeats: 1,
            power_counts: 0.0,
            back_to_back: None,
        }
    }
}

#[derive(Debug, Clone, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct DecodeSpec {
    /// Radius around DC, cycles per pixel, excluded from the carrier search.
    #[serde(default = "default_dc_exclusion")]
    pub dc_exclusion: f64,
    /// Width of the window's smooth (raised-cosine) edge, as a fraction of its radius.
    #[serde(default)]
    pub window_edge: f64,
    /// Side of the decoded grid in pixels (the crop of the spectrum); default: the
    /// smallest FFT-friendly size holding the window.
    #[serde(default)]
    pub grid_px: Option<usize>,
    /// Divide by the reference amplitude pointwise (needs `frames.reference`).
    #[serde(default = "yes")]
    pub flatten_reference: bool,
    /// Frames averaged for the automatic carrier search.
    #[serde(default = "default_carrier_frames")]
    pub carrier_frames: usize,
    /// Overlap of the sideband with the DC order is an error instead of a warning.
    #[serde(default)]
    pub strict: bool,
}

impl Default for DecodeSpec {
    fn default() -> Self {
        DecodeSpec {
            dc_exclusion: default_dc_exclusion(),
            window_edge: 0.0,
            grid_px: None,
            flatten_reference: true,
            carrier_frames: default_carrier_frames(),
            strict: false,
        }
    }
}

pub(crate) fn one() -> f64 {
    1.0
}
fn two() -> f64 {
    2.0
}
pub(crate) fn yes() -> bool {
    true
}
pub(crate) fn one_usize() -> usize {
    1
}
fn default_cladding_index() -> f64 {
    1.444
}
fn default_points_per_radius() -> usize {
    400
}
fn default_solver_extent() -> f64 {
    3.0
}
fn default_cutoff_margin_b() -> f64 {
    0.01
}
pub(crate) fn default_pols() -> Vec<String> {
    vec!["H".into(), "V".into()]
}
fn default_dc_exclusion() -> f64 {
    0.05
}
fn default_carrier_frames() -> usize {
    16
}

/// Largest `fiber.solver_points_per_radius` (the radial grid then has at most
/// 20000 x 50 = 1e6 points).
pub const MAX_POINTS_PER_RADIUS: usize = 20_000;
/// Largest `fiber.solver_extent_radii`.
pub const MAX_EXTENT_RADII: f64 = 50.0;

fn finite_positive(file: &str, key: &str, v: f64) -> Result<()> {
    if !v.is_finite() || v <= 0.0 {
        return Err(Error::setup(file, key, v, "must be a finite number > 0"));
    }
    Ok(())
}

/// The first array in `given` longer than its counterpart in `read`: (key, given, read).
fn extra_values(
    given: &toml::Table,
    read: &toml::Table,
    prefix: &str,
) -> Option<(String, usize, usize)> {
    for (k, g) in given {
        let key = if prefix.is_empty() {
            k.clone()
        } else {
            format!("{prefix}.{k}")
        };
        let Some(r) = read.get(k) else { continue };
        let found = match (g, r) {
            (toml::Value::Table(a), toml::Value::Table(b)) => extra_values(a, b, &key),
            (toml::Value::Array(a), toml::Value::Array(b)) => {
                if a.len() > b.len() && !b.iter().any(|v| v.is_table()) {
                    Some((key.clone(), a.len(), b.len()))
                } else {
                    a.iter()
                        .zip(b)
                        .enumerate()
                        .find_map(|(i, (x, y))| match (x, y) {
                            (toml::Value::Table(x), toml::Value::Table(y)) => {
                                extra_values(x, y, &format!("{key}[{i}]"))
                            }
                            _ => None,
                        })
                }
            }
            _ => None,
        };
        if found.is_some() {
            return found;
        }
    }
    None
}

/// Parse TOML text read from `path` (errors name the file) and give the folder that relative
/// paths in it resolve against ("." for a bare file name). Shared by setups and scenarios.
pub(crate) fn parse_toml<T: serde::de::DeserializeOwned + Serialize>(
    text: &str,
    path: &Path,
) -> Result<(T, PathBuf)> {
    let value: T = toml::from_str(text).map_err(|e| Error::Parse {
        file: path.display().to_string(),
        message: e.to_string(),
    })?;
    // Fixed-size arrays take their first values and drop the rest without a word: compare
    // every array given with the one read back, and refuse extra values.
    if let (Ok(given), Ok(toml::Value::Table(read))) =
        (text.parse::<toml::Table>(), toml::Value::try_from(&value))
    {
        extra_values(&given, &read, "").map_or(Ok(()), |(key, n, m)| {
            Err(Error::setup(
                path.display().to_string(),
                key,
                format!("{n} values"),
                format!("takes {m} values"),
            ))
        })?;
    }
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p.to_path_buf(),
        _ => PathBuf::from("."),
    };
    Ok((value, dir))
}

impl Setup {
    /// Read, parse, resolve paths and validate a setup file.
    pub fn load(path: &Path) -> Result<Setup> {
        let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
        Setup::from_toml(&text, path)
    }

    /// Parse and validate setup text as if read from `path` (paths resolve next to it).
    pub fn from_toml(text: &str, path: &Path) -> Result<Setup> {
        let (mut s, dir): (Setup, PathBuf) = parse_toml(text, path)?;
        s.file = path.to_path_buf();
        s.dir = dir;
        s.validate()?;
        Ok(s)
    }

    /// A path from the setup, resolved against the setup's folder.
    pub fn resolve(&self, p: &Path) -> PathBuf {
        if p.is_absolute() {
            p.to_path_buf()
        } else {
            self.dir.join(p)
        }
    }

    /// Name of the setup file, for messages.
    pub fn file_name(&self) -> String {
        self.file.display().to_string()
    }

    /// Number of input polarisations.
    pub fn n_input_pols(&self) -> usize {
        self.launch.polarizations.len()
    }

    /// Check every value; errors name the key and the value.
    pub fn validate(&self) -> Result<()> {
        let f = self.file_name();
        let f = f.as_str();
        if self.version != 1 {
            return Err(Error::setup(
                f,
                "version",
                self.version,
                "only version 1 is known",
            ));
        }
        finite_positive(f, "light.wavelength_nm", self.light.wavelength_nm)?;
        finite_positive(f, "camera.pixel_pitch_um", self.camera.pixel_pitch_um)?;
        let ff = self.camera.fill_factor;
        if !(ff.is_finite() && ff > 0.0 && ff <= 1.0) {
            return Err(Error::setup(
                f,
                "camera.fill_factor",
                ff,
                "must be in (0, 1]",
            ));
        }
        if let Some(sat) = self.camera.saturation_counts {
            finite_positive(f, "camera.saturation_counts", sat)?;
        }
        self.validate_fiber(f)?;
        self.validate_basis(f)?;
        let mut names = std::collections::HashSet::new();
        for (i, ch) in self.channels.iter().enumerate() {
            let k = |name: &str| format!("channel[{i}].{name}");
            if ch.name.is_empty() || !names.insert(ch.name.clone()) {
                return Err(Error::setup(
                    f,
                    k("name"),
                    format!("{:?}", ch.name),
                    "must be a non-empty name used by one channel only",
                ));
            }
            if ch.region[2] < 8 || ch.region[3] < 8 {
                return Err(Error::setup(
                    f,
                    k("region"),
                    format!("{:?}", ch.region),
                    "width and height must be at least 8 pixels",
                ));
            }
            finite_positive(f, &k("magnification"), ch.magnification)?;
            finite_positive(f, &k("scale"), ch.scale)?;
            if let AutoOr::Auto(s) = &ch.carrier {
                if s != "auto" {
                    return Err(Error::setup(
                        f,
                        k("carrier"),
                        format!("{s:?}"),
                        "must be \"auto\" or [fx, fy] in cycles per pixel",
                    ));
                }
            }
            if let AutoOr::Auto(s) = &ch.window_radius {
                if s != "auto" {
                    return Err(Error::setup(
                        f,
                        k("window_radius"),
                        format!("{s:?}"),
                        "must be \"auto\" or a radius in cycles per pixel",
                    ));
                }
            }
            if ch.carrier_period_px.is_some() != ch.carrier_angle_deg.is_some() {
                return Err(Error::setup(
                    f,
                    k("carrier_period_px"),
                    format!("{:?}", ch.carrier_period_px),
                    "give carrier_period_px and carrier_angle_deg together",
                ));
            }
            if let Some(p) = ch.carrier_period_px {
                if !(p.is_finite() && p >= 2.0) {
                    return Err(Error::setup(
                        f,
                        k("carrier_period_px"),
                        p,
                        "must be at least 2 pixels per fringe (Nyquist)",
                    ));
                }
            }
            if let Some(c) = ch.carrier_cycles_per_px() {
                let r = (c[0] * c[0] + c[1] * c[1]).sqrt();
                if !(c[0].is_finite() && c[1].is_finite())
                    || c[0].abs() > 0.5
                    || c[1].abs() > 0.5
                    || r == 0.0
                {
                    return Err(Error::setup(
                        f,
                        k("carrier"),
                        format!("{c:?}"),
                        "each component must be in [-0.5, 0.5] cycles per pixel and not both 0",
                    ));
                }
            }
            if let Some(w) = ch.window_radius.value() {
                if !(w.is_finite() && w > 0.0 && w < 0.5) {
                    return Err(Error::setup(
                        f,
                        k("window_radius"),
                        w,
                        "must be in (0, 0.5) cycles per pixel",
                    ));
                }
            }
            for (key, v) in [
                ("center_um", ch.center_um[0]),
                ("center_um", ch.center_um[1]),
                ("rotation_deg", ch.rotation_deg),
                ("tilt_mrad", ch.tilt_mrad[0]),
                ("tilt_mrad", ch.tilt_mrad[1]),
                ("defocus_um", ch.defocus_um),
            ] {
                if !v.is_finite() {
                    return Err(Error::setup(f, k(key), v, "must be a finite number"));
                }
            }
        }
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
        if !(l.power_counts.is_finite() && l.power_counts >= 0.0) {
            return Err(Error::setup(
                f,
                "launch.power_counts",
                l.power_counts,
                "must be >= 0 (0: relative insertion loss)",
            ));
        }
        let d = &self.decode;
        if !(d.dc_exclusion.is_finite() && d.dc_exclusion > 0.0 && d.dc_exclusion < 0.5) {
            return Err(Error::setup(
                f,
                "decode.dc_exclusion",
                d.dc_exclusion,
                "must be in (0, 0.5) cycles per pixel",
            ));
        }
        if !(d.window_edge.is_finite() && (0.0..=1.0).contains(&d.window_edge)) {
            return Err(Error::setup(
                f,
                "decode.window_edge",
                d.window_edge,
                "must be in [0, 1]",
            ));
        }
        if let Some(g) = d.grid_px {
            if g < 8 {
                return Err(Error::setup(f, "decode.grid_px", g, "must be at least 8"));
            }
        }
        if d.carrier_frames == 0 {
            return Err(Error::setup(
                f,
                "decode.carrier_frames",
                0,
                "must be at least 1",
            ));
        }
        Ok(())
    }

    fn validate_fiber(&self, f: &str) -> Result<()> {
        let fb = &self.fiber;
        let n2 = fb.cladding_index;
        if !(n2.is_finite() && n2 >= 1.0) {
            return Err(Error::setup(
                f,
                "fiber.cladding_index",
                n2,
                "must be a finite index >= 1",
            ));
        }
        if fb.profile != ProfileKind::Table {
            match fb.core_radius_um {
                None => {
                    return Err(Error::setup(
                        f,
                        "fiber.core_radius_um",
                        "(missing)",
                        "required for step and graded profiles",
                    ))
                }
                Some(a) => finite_positive(f, "fiber.core_radius_um", a)?,
            }
            match (fb.na, fb.core_index) {
                (Some(_), Some(_)) => {
                    return Err(Error::setup(
                        f,
                        "fiber.na",
                        fb.na.unwrap(),
                        "give na or core_index, not both",
                    ))
                }
                (None, None) => {
                    return Err(Error::setup(
                        f,
                        "fiber.na",
                        "(missing)",
                        "give na or core_index",
                    ))
                }
                (Some(na), None) => {
                    finite_positive(f, "fiber.na", na)?;
                    if na >= n2 {
                        return Err(Error::setup(
                            f,
                            "fiber.na",
                            na,
                            format!("must be below the cladding index {n2} (weak guidance)"),
                        ));
                    }
                }
                (None, Some(n1)) => {
                    if !(n1.is_finite() && n1 > n2) {
                        return Err(Error::setup(
                            f,
                            "fiber.core_index",
                            n1,
                            format!("must exceed the cladding index {n2}"),
                        ));
                    }
                }
            }
        } else if fb.table.is_none() {
            return Err(Error::setup(
                f,
                "fiber.table",
                "(missing)",
                "profile = \"table\" needs a table file (CSV: radius_um,index)",
            ));
        }
        if fb.profile == ProfileKind::Graded && !(fb.alpha.is_finite() && fb.alpha > 0.0) {
            return Err(Error::setup(
                f,
                "fiber.alpha",
                fb.alpha,
                "must be a finite exponent > 0",
            ));
        }
        if !(20..=MAX_POINTS_PER_RADIUS).contains(&fb.solver_points_per_radius) {
            return Err(Error::setup(
                f,
                "fiber.solver_points_per_radius",
                fb.solver_points_per_radius,
                format!("must be between 20 and {MAX_POINTS_PER_RADIUS} (default 400)"),
            ));
        }
        if !(fb.solver_extent_radii.is_finite()
            && (1.5..=MAX_EXTENT_RADII).contains(&fb.solver_extent_radii))
        {
            return Err(Error::setup(
                f,
                "fiber.solver_extent_radii",
                fb.solver_extent_radii,
                format!("must be between 1.5 and {MAX_EXTENT_RADII} core radii (default 3)"),
            ));
        }
        if !(fb.cutoff_margin_b.is_finite() && (0.0..0.5).contains(&fb.cutoff_margin_b)) {
            return Err(Error::setup(
                f,
                "fiber.cutoff_margin_b",
                fb.cutoff_margin_b,
                "must be in [0, 0.5)",
            ));
        }
        Ok(())
    }

    fn validate_basis(&self, f: &str) -> Result<()> {
        let b = &self.basis;
        if let Some(g) = b.groups {
            if g == 0 {
                return Err(Error::setup(
                    f,
                    "basis.groups",
                    0,
                    "keep at least one mode group",
                ));
            }
        }
        if let Some(w) = b.waist_um {
            finite_positive(f, "basis.waist_um", w)?;
        }
        if matches!(b.kind, BasisKind::Lg | BasisKind::Hg) && b.groups.is_none() {
            return Err(Error::setup(
                f,
                "basis.groups",
                "(missing)",
                "lg and hg bases need the number of mode groups",
            ));
        }
        Ok(())
    }

    /// Numerical aperture and core index (n1) of the step / graded profile.
    pub fn na_and_core_index(&self) -> Option<(f64, f64)> {
        let n2 = self.fiber.cladding_index;
        match (self.fiber.na, self.fiber.core_index) {
            (Some(na), _) => Some((na, (n2 * n2 + na * na).sqrt())),
            (None, Some(n1)) => Some(((n1 * n1 - n2 * n2).sqrt(), n1)),
            _ => None,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const MINIMAL: &str = r#"
version = 1
[light]
wavelength_nm = 1550.0
[camera]
pixel_pitch_um = 5.5
[fiber]
profile = "graded"
core_radius_um = 25.0
na = 0.2
"#;

    #[test]
    fn minimal_setup_loads_with_defaults() {
        let s = Setup::from_toml(MINIMAL, Path::new("x/setup.toml")).unwrap();
        assert_eq!(s.fiber.cladding_index, 1.444);
        assert_eq!(s.fiber.alpha, 2.0);
        assert_eq!(s.launch.polarizations, vec!["H", "V"]);
        assert_eq!(s.dir, PathBuf::from("x"));
    }

    #[test]
    fn unknown_key_is_named() {
        let t = format!("{MINIMAL}\nbogus_key = 3\n");
        let e = Setup::from_toml(&t, Path::new("s.toml"))
            .unwrap_err()
            .to_string();
        assert!(e.contains("bogus_key"), "{e}");
    }

    #[test]
    fn na_above_cladding_index_is_rejected() {
        let t = MINIMAL.replace("na = 0.2", "na = 1.6");
        let e = Setup::from_toml(&t, Path::new("s.toml"))
            .unwrap_err()
            .to_string();
        assert!(e.contains("fiber.na") && e.contains("1.6"), "{e}");
    }

    #[test]
    fn carrier_auto_or_value() {
        let t = format!("{MINIMAL}\n[[channel]]\nname = \"H\"\nregion = [0, 0, 64, 64]\nmagnification = 20.0\ncarrier = [0.25, -0.1]\n");
        let s = Setup::from_toml(&t, Path::new("s.toml")).unwrap();
        assert_eq!(s.channels[0].carrier_cycles_per_px(), Some([0.25, -0.1]));
        let t = t.replace("carrier = [0.25, -0.1]", "carrier = \"automatic\"");
        assert!(Setup::from_toml(&t, Path::new("s.toml")).is_err());
    }
}
