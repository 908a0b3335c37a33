//! Refractive-index profiles of the fibre: step, graded power law and tabulated.
//!
//! Every profile is expressed by its normalised shape
//! `f(rho) = (n(rho a)^2 - n2^2) / (n1^2 - n2^2)`, rho = r / a, so that the scalar wave
//! equation only needs `f` and the V-number `V = k a NA`, `NA = sqrt(n1^2 - n2^2)`.
//! - step: f = 1 inside the core, 0 outside;
//! - graded (power law, Gloge & Marcatili 1973): `n^2 = n1^2 (1 - 2 Delta (r/a)^alpha)`
//!   inside, n2 outside, so f = 1 - rho^alpha;
//! - table: CSV `radius_um,index` with a header row, linear interpolation; n2 is the last
//!   row's index (the cladding; `fiber.cladding_index` is not used) and holds beyond it; n1
//!   is the largest index in the table.
use crate::error::{Error, Result};
use crate::setup::{ProfileKind, Setup};
use std::path::Path;

/// Minimum number of data rows of a profile table.
pub const MIN_TABLE_ROWS: usize = 5;

/// Shape of an index profile.
#[derive(Debug, Clone, PartialEq)]
pub enum Shape {
    Step,
    Graded {
        alpha: f64,
    },
    /// Normalised radii (r / a) and normalised shape values f at the table rows.
    Table {
        rho: Vec<f64>,
        f: Vec<f64>,
    },
}

/// A fibre's index profile.
#[derive(Debug, Clone, PartialEq)]
pub struct Profile {
    pub shape: Shape,
    /// Core radius a, micrometres.
    pub core_radius_um: f64,
    /// Peak (core) index n1.
    pub core_index: f64,
    /// Cladding index n2.
    pub cladding_index: f64,
    /// Numerical aperture sqrt(n1^2 - n2^2) (kept as given, not recomputed).
    pub na: f64,
}

impl Profile {
    /// Step profile from radius, NA and cladding index.
    pub fn step(core_radius_um: f64, na: f64, cladding_index: f64) -> Profile {
        Profile {
            shape: Shape::Step,
            core_radius_um,
            core_index: (cladding_index * cladding_index + na * na).sqrt(),
            cladding_index,
            na,
        }
    }

    /// Power-law profile (alpha = 2: parabolic).
    pub fn graded(core_radius_um: f64, na: f64, cladding_index: f64, alpha: f64) -> Profile {
        Profile {
            shape: Shape::Graded { alpha },
            ..Profile::step(core_radius_um, na, cladding_index)
        }
    }

    /// The profile the setup's `[fiber]` section describes (reads the table file).
    pub fn from_setup(setup: &Setup) -> Result<Profile> {
        let fb = &setup.fiber;
        let n2 = fb.cladding_index;
        match fb.profile {
            ProfileKind::Step | ProfileKind::Graded => {
                let a = fb.core_radius_um.unwrap_or(0.0);
                let (na, _) = setup.na_and_core_index().ok_or_else(|| {
                    Error::setup(
                        setup.file_name(),
                        "fiber.na",
                        "(missing)",
                        "give na or core_index",
                    )
                })?;
                Ok(if fb.profile == ProfileKind::Step {
                    Profile::step(a, na, n2)
                } else {
                    Profile::graded(a, na, n2, fb.alpha)
                })
            }
            ProfileKind::Table => {
                let rel = fb.table.clone().unwrap_or_default();
                let path = setup.resolve(&rel);
                let text = std::fs::read_to_string(&path).map_err(|e| {
                    Error::setup(
                        setup.file_name(),
                        "fiber.table",
                        path.display(),
                        format!("cannot read the profile table: {e}"),
                    )
                })?;
                let rows = parse_table(&text, &path, &setup.file_name())?;
                // The table's last row is the cladding (docs/setup.md); `cladding_index` is
                // not used for a table.
                let n2_table = rows[rows.len() - 1].1;
                Profile::from_rows(
                    &rows,
                    fb.core_radius_um,
                    n2_table,
                    &path,
                    &setup.file_name(),
                )
            }
        }
    }

    /// A tabulated profile from (radius_um, index) rows (already checked by [`parse_table`]).
    pub fn from_rows(
        rows: &[(f64, f64)],
        core_radius_um: Option<f64>,
        cladding_index: f64,
        path: &Path,
        setup_file: &str,
    ) -> Result<Profile> {
        let n1 = rows.iter().map(|r| r.1).fold(f64::MIN, f64::max);
        if n1 <= cladding_index {
            return Err(Error::setup(
                setup_file,
                "fiber.table",
                format!("{} (largest index {n1})", path.display()),
                format!("no index in the table exceeds the cladding index {cladding_index}: the profile guides no mode"),
            ));
        }
        let a = core_radius_um.unwrap_or(rows[rows.len() - 1].0);
        if !(a.is_finite() && a > 0.0) {
            return Err(Error::setup(
                setup_file,
                "fiber.core_radius_um",
                a,
                "must be > 0 (for a table: the radius where the profile meets the cladding)",
            ));
        }
        let na2 = n1 * n1 - cladding_index * cladding_index;
        let rho = rows.iter().map(|r| r.0 / a).collect();
        let f = rows
            .iter()
            .map(|r| (r.1 * r.1 - cladding_index * cladding_index) / na2)
            .collect();
        Ok(Profile {
            shape: Shape::Table { rho, f },
            core_radius_um: a,
            core_index: n1,
            cladding_index,
            na: na2.sqrt(),
        })
    }

    /// Numerical aperture sqrt(n1^2 - n2^2).
    pub fn na(&self) -> f64 {
        self.na
    }

    /// V = 2 pi a NA / lambda.
    pub fn v_number(&self, wavelength_nm: f64) -> f64 {
        2.0 * std::f64::consts::PI * self.core_radius_um * self.na() / (wavelength_nm * 1e-3)
    }

    /// Normalised shape f(rho) = (n^2 - n2^2) / NA^2 at rho = r / a.
    pub fn f(&self, rho: f64) -> f64 {
        match &self.shape {
            Shape::Step => {
                if rho < 1.0 {
                    1.0
                } else {
                    0.0
                }
            }
            Shape::Graded { alpha } => {
                if rho < 1.0 {
                    1.0 - rho.powf(*alpha)
                } else {
                    0.0
                }
            }
            Shape::Table { rho: r, f } => {
                if rho <= r[0] {
                    return f[0];
                }
                let last = r.len() - 1;
                if rho > r[last] {
                    return 0.0;
                }
                let i = r.partition_point(|&x| x < rho).clamp(1, last);
                let t = (rho - r[i - 1]) / (r[i] - r[i - 1]);
                f[i - 1] + t * (f[i] - f[i - 1])
            }
        }
    }

    /// Refractive index at radius r (micrometres).
    pub fn index(&self, r_um: f64) -> f64 {
        let n2 = self.cladding_index;
        let na2 = self.na * self.na;
        (n2 * n2 + na2 * self.f(r_um / self.core_radius_um)).sqrt()
    }
}

/// Parse a profile table (CSV with header `radius_um,index`). Errors name `fiber.table`, the
/// file, the row (1-based line number) and the value.
pub fn parse_table(text: &str, path: &Path, setup_file: &str) -> Result<Vec<(f64, f64)>> {
    let bad = |line: usize, value: &str, reason: &str| {
        Error::setup(
            setup_file,
            "fiber.table",
            format!("{} line {line}: {value:?}", path.display()),
            reason.to_string(),
        )
    };
    let mut rows: Vec<(f64, f64)> = Vec::new();
    let mut header_seen = false;
    for (i, raw) in text.lines().enumerate() {
        let line_no = i + 1;
        let line = raw.trim();
        if line.is_empty() || line.starts_with('#') {
            continue;
        }
        if !header_seen {
            header_seen = true;
            let cols: Vec<String> = line.split(',').map(|c| c.trim().to_lowercase()).collect();
            if cols.len() < 2 || cols[0] != "radius_um" || cols[1] != "index" {
                return Err(bad(
                    line_no,
                    line,
                    "the first row must be the header `radius_um,index`",
                ));
            }
            continue;
        }
        let cols: Vec<&str> = line.split(',').map(str::trim).collect();
        if cols.len() < 2 {
            return Err(bad(line_no, line, "expected two columns: radius_um,index"));
        }
        let r: f64 = cols[0]
            .parse()
            .map_err(|_| bad(line_no, cols[0], "radius_um is not a number"))?;
        let n: f64 = cols[1]
            .parse()
            .map_err(|_| bad(line_no, cols[1], "index is not a number"))?;
        if !(r.is_finite() && r >= 0.0) {
            return Err(bad(line_no, cols[0], "radius_um must be finite and >= 0"));
        }
        if !(n.is_finite() && n >= 1.0) {
            return Err(bad(line_no, cols[1], "index must be a finite number >= 1"));
        }
        if let Some(&(prev, _)) = rows.last() {
            if r <= prev {
                return Err(bad(
                    line_no,
                    cols[0],
                    &format!("radius_um must increase from row to row (previous {prev})"),
                ));
            }
        }
        rows.push((r, n));
    }
    if rows.len() < MIN_TABLE_ROWS {
        return Err(Error::setup(
            setup_file,
            "fiber.table",
            format!("{} ({} data rows)", path.display(), rows.len()),
            format!("needs at least {MIN_TABLE_ROWS} data rows"),
        ));
    }
    Ok(rows)
}
