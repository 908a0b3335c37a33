//! Folder polling for `modegram watch`: which frame files in a folder are new and complete.
//!
//! Contract: [`Watcher::poll`] lists the folder's frame files (`.tif`, `.tiff`, `.png`,
//! `.npy`, case-insensitive; names starting with `.` are ignored as temporary files) and
//! returns those that are *ready*: seen with the same size and modification time on two
//! consecutive polls and not yet handled, oldest first (modification time, then name). The
//! caller tries to decode each; [`Watcher::done`] marks success, [`Watcher::retry`] a
//! failed attempt: the file stays pending (it may still be being written) until it has been
//! unchanged for `give_up` without decoding, then it is reported as incomplete and dropped.
//! A file that keeps changing for longer than `give_up` is reported the same way.
use crate::error::{Error, Result};
use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant, SystemTime};

/// Extensions of frame files.
pub const FRAME_EXTENSIONS: [&str; 4] = ["tif", "tiff", "png", "npy"];

/// True for a frame file name (by extension; hidden files excluded).
pub fn is_frame_file(p: &Path) -> bool {
    let hidden = p
        .file_name()
        .and_then(|n| n.to_str())
        .map(|n| n.starts_with('.'))
        .unwrap_or(true);
    let ext = p
        .extension()
        .and_then(|e| e.to_str())
        .map(|e| e.to_ascii_lowercase());
    !hidden
        && ext
            .map(|e| FRAME_EXTENSIONS.contains(&e.as_str()))
            .unwrap_or(false)
}

#[derive(Debug, Clone)]
struct Pending {
    size: u64,
    mtime: Option<SystemTime>,
    /// Consecutive polls with unchanged size and time.
    stable: usize,
    first_seen: Instant,
    last_change: Instant,
    last_error: Option<String>,
}

/// A file given up on: never became complete or decodable.
#[derive(Debug, Clone)]
pub struct Incomplete {
    pub path: PathBuf,
    pub reason: String,
}

/// Polls one folder.
#[derive(Debug)]
pub struct Watcher {
    pub dir: PathBuf,
    pub give_up: Duration,
    pending: HashMap<PathBuf, Pending>,
    handled: HashSet<PathBuf>,
}

impl Watcher {
    /// Watch `dir`; an error names the folder when it does not exist or is not a folder.
    pub fn new(dir: &Path, give_up: Duration) -> Result<Watcher> {
        let md = std::fs::metadata(dir)
            .map_err(|e| Error::Input(format!("watch folder {}: {e}", dir.display())))?;
        if !md.is_dir() {
            return Err(Error::Input(format!(
                "watch folder {}: not a folder",
                dir.display()
            )));
        }
        Ok(Watcher {
            dir: dir.to_path_buf(),
            give_up,
            pending: HashMap::new(),
            handled: HashSet::new(),
        })
    }

    /// Files handled so far (decoded or given up).
    pub fn handled(&self) -> usize {
        self.handled.len()
    }

    /// Files seen but not yet handled.
    pub fn pending(&self) -> usize {
        self.pending.len()
    }

    /// One poll: returns the ready files (oldest first) and the files given up on.
    pub fn poll(&mut self) -> Result<(Vec<PathBuf>, Vec<Incomplete>)> {
        let now = Instant::now();
        let rd = std::fs::read_dir(&self.dir)
            .map_err(|e| Error::Input(format!("watch folder {}: {e}", self.dir.display())))?;
        let mut ready: Vec<(Option<SystemTime>, PathBuf)> = Vec::new();
        let mut present = HashSet::new();
        for entry in rd.flatten() {
            let path = entry.path();
            if !is_frame_file(&path) || self.handled.contains(&path) {
                continue;
            }
            let Ok(md) = entry.metadata() else { continue };
            if !md.is_file() {
                continue;
            }
            present.insert(path.clone());
            let (size, mtime) = (md.len(), md.modified().ok());
            let p = self.pending.entry(path.clone()).or_insert(Pending {
                size,
                mtime,
                stable: 0,
                first_seen: now,
                last_change: now,
                last_error: None,
            });
            if p.size != size || p.mtime != mtime {
                p.size = size;
                p.mtime = mtime;
                p.stable = 0;
                p.last_change = now;
            } else if p.first_seen != now {
                p.stable += 1;
            }
            if p.stable >= 1 && size > 0 {
                ready.push((mtime, path));
            }
        }
        // Files that vanished before completing are forgotten.
        self.pending.retain(|k, _| present.contains(k));
        let mut gave_up = Vec::new();
        let ready_set: HashSet<PathBuf> = ready.iter().map(|r| r.1.clone()).collect();
        for (path, p) in &self.pending {
            if !ready_set.contains(path) && now.duration_since(p.first_seen) > self.give_up {
                gave_up.push(Incomplete {
                    path: path.clone(),
                    reason: format!(
                        "still changing (or empty) after {:.1} s: never completed",
                        now.duration_since(p.first_seen).as_secs_f64()
                    ),
                });
            }
        }
        for g in &gave_up {
            self.pending.remove(&g.path);
            self.handled.insert(g.path.clone());
        }
        ready.sort();
        Ok((ready.into_iter().map(|r| r.1).collect(), gave_up))
    }

    /// The file was decoded: never return it again.
    pub fn done(&mut self, path: &Path) {
        self.pending.remove(path);
        self.handled.insert(path.to_path_buf());
    }

    /// Decoding the file failed: keep it pending (it may still be being written) unless it
    /// has been unchanged for `give_up`; then it is returned as incomplete and dropped.
    pub fn retry(&mut self, path: &Path, reason: &str) -> Option<Incomplete> {
        let now = Instant::now();
        let p = self.pending.get_mut(path)?;
        p.last_error = Some(reason.to_string());
        if now.duration_since(p.last_change) >= self.give_up {
            self.pending.remove(path);
            self.handled.insert(path.to_path_buf());
            return Some(Incomplete {
                path: path.to_path_buf(),
                reason: format!(
                    "unchanged for {:.1} s but does not decode: {reason}",
                    self.give_up.as_secs_f64()
                ),
            });
        }
        None
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn frame_file_names() {
        assert!(is_frame_file(Path::new("a/f001.TIF")));
        assert!(is_frame_file(Path::new("x.npy")));
        assert!(!is_frame_file(Path::new(".f001.tif")));
        assert!(!is_frame_file(Path::new("notes.txt")));
        assert!(!is_frame_file(Path::new("tif")));
    }

    #[test]
    fn missing_folder_is_named() {
        let e = Watcher::new(
            Path::new("/nonexistent/frames-here"),
            Duration::from_secs(1),
        )
        .unwrap_err();
        assert!(e.to_string().contains("/nonexistent/frames-here"), "{e}");
    }

    #[test]
    fn file_is_ready_only_after_two_equal_polls() {
        let d = tempfile::tempdir().unwrap();
        let mut w = Watcher::new(d.path(), Duration::from_secs(60)).unwrap();
        let p = d.path().join("f1.npy");
        std::fs::write(&p, b"abc").unwrap();
        let (r, _) = w.poll().unwrap();
        assert!(r.is_empty(), "first sighting is not enough");
        std::fs::write(&p, b"abcdef").unwrap();
        let (r, _) = w.poll().unwrap();
        assert!(r.is_empty(), "grew since the last poll");
        let (r, _) = w.poll().unwrap();
        assert_eq!(r, vec![p.clone()]);
        // a failed decode keeps it pending while the give-up time has not passed
        assert!(w.retry(&p, "truncated").is_none());
        let (r, _) = w.poll().unwrap();
        assert_eq!(r.len(), 1);
        w.done(&p);
        let (r, _) = w.poll().unwrap();
        assert!(r.is_empty());
        assert_eq!(w.handled(), 1);
        // other files are ignored
        std::fs::write(d.path().join("readme.txt"), b"x").unwrap();
        w.poll().unwrap();
        assert_eq!(w.pending(), 0);
    }

    #[test]
    fn undecodable_file_is_given_up_after_the_limit() {
        let d = tempfile::tempdir().unwrap();
        let mut w = Watcher::new(d.path(), Duration::from_millis(30)).unwrap();
        let p = d.path().join("bad.tif");
        std::fs::write(&p, b"not a tiff").unwrap();
        w.poll().unwrap();
        let (r, _) = w.poll().unwrap();
        assert_eq!(r.len(), 1);
        std::thread::sleep(Duration::from_millis(40));
        let g = w.retry(&p, "not a TIFF").expect("given up");
        assert!(g.reason.contains("does not decode"), "{}", g.reason);
        let (r, g) = w.poll().unwrap();
        assert!(r.is_empty() && g.is_empty());
    }

    #[test]
    fn empty_file_that_never_fills_is_reported() {
        let d = tempfile::tempdir().unwrap();
        let mut w = Watcher::new(d.path(), Duration::from_millis(30)).unwrap();
        std::fs::write(d.path().join("empty.png"), b"").unwrap();
        w.poll().unwrap();
        std::thread::sleep(Duration::from_millis(40));
        let (r, g) = w.poll().unwrap();
        assert!(r.is_empty());
        assert_eq!(g.len(), 1);
        assert!(g[0].reason.contains("never completed"));
    }
}
