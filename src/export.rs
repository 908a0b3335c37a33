//! Writing results: every file goes to a temporary name in the output folder and is renamed
//! into place when complete, so a crash never leaves a half-written result; an existing result
//! is only replaced with `--force`.
//!
//! Arrays are NPY (readable by `numpy.load`), tables CSV, metadata JSON.
use crate::error::{Error, Result};
use ndarray::{ArrayBase, Data, Dimension};
use ndarray_npy::WritableElement;
use std::io::Write;
use std::path::{Path, PathBuf};

/// An output folder with the overwrite policy of the command that writes into it.
#[derive(Debug, Clone)]
pub struct OutDir {
    pub path: PathBuf,
    pub force: bool,
}

impl OutDir {
    /// Create the folder (and parents) if needed.
    pub fn create(path: impl Into<PathBuf>, force: bool) -> Result<OutDir> {
        let path = path.into();
        if path.exists() && !path.is_dir() {
            return Err(Error::Input(format!(
                "--out {}: is a file, not a folder; give a folder for the results",
                path.display()
            )));
        }
        std::fs::create_dir_all(&path).map_err(|e| Error::io(&path, e))?;
        Ok(OutDir { path, force })
    }

    /// A hidden staging folder inside this one, for writing a whole result set before
    /// [`OutDir::promote`] puts it in place.
    pub fn stage(&self) -> Result<OutDir> {
        let p = self.path.join(format!(".staging-{}", std::process::id()));
        if p.exists() {
            std::fs::remove_dir_all(&p).map_err(|e| Error::io(&p, e))?;
        }
        std::fs::create_dir_all(&p).map_err(|e| Error::io(&p, e))?;
        Ok(OutDir {
            path: p,
            force: true,
        })
    }

    /// Move every file of `staged` into this folder (renamed over its target), and remove a
    /// file of the result set `names` that this run did not produce
    /// (e.g. calibration.json of an earlier calibrated run) is removed, so the folder never
    /// mixes two runs. The staging folder is removed.
    pub fn promote(&self, staged: &OutDir, names: &[&str]) -> Result<()> {
        let mut written: Vec<std::ffi::OsString> = std::fs::read_dir(&staged.path)
            .map_err(|e| Error::io(&staged.path, e))?
            .filter_map(|e| e.ok())
            .filter(|e| e.path().is_file())
            .map(|e| e.file_name())
            .filter(|n| !n.to_string_lossy().starts_with('.'))
            .collect();
        written.sort();
        for n in &written {
            let dst = self.path.join(n);
            std::fs::rename(staged.path.join(n), &dst).map_err(|e| Error::io(&dst, e))?;
        }
        for n in names {
            let dst = self.file(n);
            if dst.exists() && !written.iter().any(|w| w == std::ffi::OsStr::new(n)) {
                std::fs::remove_file(&dst).map_err(|e| Error::io(&dst, e))?;
            }
        }
        std::fs::remove_dir_all(&staged.path).map_err(|e| Error::io(&staged.path, e))?;
        Ok(())
    }

    /// Path of a file in the folder.
    pub fn file(&self, name: &str) -> PathBuf {
        self.path.join(name)
    }

    /// Fail before any work is done when one of `names` exists and `--force` is not set.
    pub fn ensure_writable(&self, names: &[&str]) -> Result<()> {
        if self.force {
            return Ok(());
        }
        for n in names {
            let p = self.file(n);
            if p.exists() {
                return Err(Error::Exists { path: p });
            }
        }
        Ok(())
    }

    /// Write a file atomically: temporary name in the same folder, then rename.
    pub fn write_with(
        &self,
        name: &str,
        write: impl FnOnce(&mut std::io::BufWriter<std::fs::File>) -> std::io::Result<()>,
    ) -> Result<PathBuf> {
        let target = self.file(name);
        if !self.force && target.exists() {
            return Err(Error::Exists { path: target });
        }
        let tmp = self
            .path
            .join(format!(".{name}.partial-{}", std::process::id()));
        let result = (|| {
            let f = std::fs::File::create(&tmp)?;
            let mut w = std::io::BufWriter::new(f);
            write(&mut w)?;
            w.flush()?;
            w.into_inner().map_err(|e| e.into_error())?.sync_all()?;
            std::fs::rename(&tmp, &target)
        })();
        if let Err(e) = result {
            let _ = std::fs::remove_file(&tmp);
            return Err(Error::io(&target, e));
        }
        Ok(target)
    }

    /// Write raw bytes.
    pub fn write_bytes(&self, name: &str, bytes: &[u8]) -> Result<PathBuf> {
        self.write_with(name, |w| w.write_all(bytes))
    }

    /// Write text.
    pub fn write_text(&self, name: &str, text: &str) -> Result<PathBuf> {
        self.write_bytes(name, text.as_bytes())
    }

    /// Write a value as pretty JSON.
    pub fn write_json<T: serde::Serialize>(&self, name: &str, value: &T) -> Result<PathBuf> {
        let text = serde_json::to_string_pretty(value)
            .map_err(|e| Error::Input(format!("{name}: cannot serialise: {e}")))?;
        self.write_text(name, &(text + "\n"))
    }

    /// Write an array as NPY.
    pub fn write_npy<A, S, D>(&self, name: &str, array: &ArrayBase<S, D>) -> Result<PathBuf>
    where
        A: WritableElement,
        S: Data<Elem = A>,
        D: Dimension,
    {
        use ndarray_npy::WriteNpyExt;
        self.write_with(name, |w| {
            array
                .write_npy(w)
                .map_err(|e| std::io::Error::other(e.to_string()))
        })
    }
}

/// Read an NPY file into an array, naming the file in the error.
pub fn read_npy<T, D>(path: &Path) -> Result<ndarray::Array<T, D>>
where
    T: ndarray_npy::ReadableElement,
    D: Dimension,
{
    let f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
    use ndarray_npy::ReadNpyExt;
    ndarray::Array::<T, D>::read_npy(std::io::BufReader::new(f))
        .map_err(|e| Error::Input(format!("{}: not a usable NPY array: {e}", path.display())))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn existing_file_is_kept_without_force() {
        let d = tempfile::tempdir().unwrap();
        let out = OutDir::create(d.path(), false).unwrap();
        out.write_text("a.txt", "one").unwrap();
        let e = out.write_text("a.txt", "two").unwrap_err();
        assert!(matches!(e, Error::Exists { .. }));
        assert_eq!(std::fs::read_to_string(out.file("a.txt")).unwrap(), "one");
        let out = OutDir::create(d.path(), true).unwrap();
        out.write_text("a.txt", "two").unwrap();
        assert_eq!(std::fs::read_to_string(out.file("a.txt")).unwrap(), "two");
        // no temporary file left behind
        assert_eq!(std::fs::read_dir(d.path()).unwrap().count(), 1);
    }

    #[test]
    fn npy_round_trip_complex() {
        let d = tempfile::tempdir().unwrap();
        let out = OutDir::create(d.path(), false).unwrap();
        let a = ndarray::Array2::from_shape_fn((3, 4), |(i, j)| {
            num_complex::Complex64::new(i as f64, -(j as f64))
        });
        let p = out.write_npy("a.npy", &a).unwrap();
        let b: ndarray::Array2<num_complex::Complex64> = read_npy(&p).unwrap();
        assert_eq!(a, b);
    }
}
