//! Camera frames, read one at a time.
//!
//! Contract: a [`FrameReader`] opens one file (TIFF single/multi-page, PNG greyscale, NPY
//! stack (frames, height, width)), knows its frame size and, where the format allows, its
//! frame count up front, and copies one frame at a time into a caller-provided `f32` buffer
//! (row-major, `[row, col]`, x along columns, docs/conventions.md). A stack is never loaded
//! whole. A [`FrameStack`] chains several files in order and checks that every frame has the
//! same size, that no value is NaN or infinite and that no frame is all zero; errors name the
//! file and the frame index within it. [`mean_frame`] averages a whole file (dark or
//! reference frames). [`TiffStackWriter`] writes multi-page 16-bit or 32-bit float TIFFs.
use crate::error::{Error, Result};
use std::path::{Path, PathBuf};

mod npy;
mod png;
mod tiff;

pub use self::tiff::{write_tiff_f32, write_tiff_u16, TiffStackWriter};
pub use npy::npy_header;

/// Pixel type stored in a file.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PixelKind {
    U8,
    U16,
    U32,
    F32,
    F64,
}

impl PixelKind {
    /// The largest count the format can hold (integer formats), the saturation level
    /// when `camera.saturation_counts` is not given; None for floating point.
    pub fn max_counts(self) -> Option<f64> {
        match self {
            PixelKind::U8 => Some(255.0),
            PixelKind::U16 => Some(65535.0),
            PixelKind::U32 => Some(u32::MAX as f64),
            PixelKind::F32 | PixelKind::F64 => None,
        }
    }
}

enum Inner {
    Tiff(Box<tiff::TiffFrames>),
    Png(Box<png::PngFrames>),
    Npy(npy::NpyFrames),
}

/// One frame file, read frame by frame.
pub struct FrameReader {
    path: PathBuf,
    width: usize,
    height: usize,
    count: Option<usize>,
    kind: PixelKind,
    next: usize,
    inner: Inner,
}

/// Largest frame read, pixels (16384 x 16384): a header beyond it is taken as damaged
/// rather than allocated.
pub const MAX_FRAME_PIXELS: usize = 1 << 28;

/// Refuse a header whose declared size is beyond [`MAX_FRAME_PIXELS`], or (PNG) beyond what
/// the file's bytes can hold: deflate expands at most about 1032:1 (RFC 1951, the longest
/// match of 258 bytes per 2-bit code), so a PNG of N bytes holds at most about 1032 N bytes.
fn check_declared_size(path: &Path, w: usize, h: usize, ext: &str) -> Result<()> {
    let px = w.saturating_mul(h);
    if px > MAX_FRAME_PIXELS {
        return Err(Error::frame(
            path,
            None,
            format!(
                "the header declares {w} x {h} pixels ({:.0} Mpx), more than the {} Mpx a \
                 frame may have: the file is damaged or not a camera frame",
                px as f64 / 1e6,
                MAX_FRAME_PIXELS / 1_000_000
            ),
        ));
    }
    if ext == "png" {
        let bytes = std::fs::metadata(path).map(|m| m.len()).unwrap_or(u64::MAX);
        if (px as u64) > bytes.saturating_mul(1032) {
            return Err(Error::frame(
                path,
                None,
                format!(
                    "the header declares {w} x {h} pixels but the file has only {bytes} bytes, \
                     too few to hold them even fully compressed: the file is truncated or damaged"
                ),
            ));
        }
    }
    Ok(())
}

impl FrameReader {
    /// Open a file; the format is chosen by its extension (.tif/.tiff, .png, .npy).
    pub fn open(path: &Path) -> Result<FrameReader> {
        // A FIFO or a device would block or never end: frames must be regular files.
        match std::fs::metadata(path) {
            Ok(m) if !m.is_file() => {
                return Err(Error::frame(
                    path,
                    None,
                    "not a regular file (a folder, FIFO or device): give a .tif, .png or .npy file",
                ))
            }
            _ => {}
        }
        let ext = path
            .extension()
            .and_then(|e| e.to_str())
            .unwrap_or("")
            .to_ascii_lowercase();
        let (inner, width, height, count, kind) = match ext.as_str() {
            "tif" | "tiff" => {
                let t = tiff::TiffFrames::open(path)?;
                let (w, h, n, k) = (t.width, t.height, t.count, t.kind);
                (Inner::Tiff(Box::new(t)), w, h, Some(n), k)
            }
            "png" => {
                let p = png::PngFrames::open(path)?;
                let (w, h, k) = (p.width, p.height, p.kind);
                (Inner::Png(Box::new(p)), w, h, Some(1), k)
            }
            "npy" => {
                let n = npy::NpyFrames::open(path)?;
                let (w, h, c, k) = (n.width, n.height, n.count, n.kind);
                (Inner::Npy(n), w, h, Some(c), k)
            }
            _ => {
                return Err(Error::frame(
                    path,
                    None,
                    format!("unknown frame format {ext:?}: use .tif/.tiff, .png or .npy"),
                ))
            }
        };
        if width == 0 || height == 0 {
            return Err(Error::frame(path, None, "frame has no pixels"));
        }
        check_declared_size(path, width, height, &ext)?;
        Ok(FrameReader {
            path: path.to_path_buf(),
            width,
            height,
            count,
            kind,
            next: 0,
            inner,
        })
    }

    pub fn path(&self) -> &Path {
        &self.path
    }
    pub fn width(&self) -> usize {
        self.width
    }
    pub fn height(&self) -> usize {
        self.height
    }
    /// Number of frames in the file, when known before reading.
    pub fn len(&self) -> Option<usize> {
        self.count
    }
    /// True when the file is known to hold no frame.
    pub fn is_empty(&self) -> bool {
        self.count == Some(0)
    }
    pub fn kind(&self) -> PixelKind {
        self.kind
    }
    /// Index (within this file) of the frame the next call reads.
    pub fn position(&self) -> usize {
        self.next
    }

    /// Read the next frame into `buf` (length width * height). Ok(false) at the end.
    pub fn read_next(&mut self, buf: &mut [f32]) -> Result<bool> {
        if buf.len() != self.width * self.height {
            return Err(Error::Input(format!(
                "{}: frame buffer holds {} values, the frame {}",
                self.path.display(),
                buf.len(),
                self.width * self.height
            )));
        }
        let idx = self.next;
        let got = match &mut self.inner {
            Inner::Tiff(t) => t.read(idx, buf),
            Inner::Png(p) => p.read(idx, buf),
            Inner::Npy(n) => n.read(idx, buf),
        }
        .map_err(|reason| Error::frame(&self.path, Some(idx), reason))?;
        if got {
            self.next += 1;
        }
        Ok(got)
    }
}

/// Where a frame of a [`FrameStack`] came from.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FrameOrigin {
    /// Index of the file in the stack's list.
    pub file: usize,
    /// Index of the frame within its file.
    pub frame: usize,
}

/// Several frame files read in order as one stream of equally sized frames.
pub struct FrameStack {
    paths: Vec<PathBuf>,
    current: Option<FrameReader>,
    file: usize,
    width: usize,
    height: usize,
    kind: PixelKind,
    total: Option<usize>,
    reject_blank: bool,
}

impl FrameStack {
    /// Open the first file (and count the frames of all). Every file must hold frames of
    /// the first file's size.
    pub fn open(paths: &[PathBuf]) -> Result<FrameStack> {
        if paths.is_empty() {
            return Err(Error::Input("no frame file given".into()));
        }
        let first = FrameReader::open(&paths[0])?;
        let (width, height, kind) = (first.width, first.height, first.kind);
        let mut total = first.len();
        for p in &paths[1..] {
            let r = FrameReader::open(p)?;
            if (r.width, r.height) != (width, height) {
                return Err(Error::frame(
                    p,
                    Some(0),
                    format!(
                        "frames are {}x{} pixels, but {} has {}x{} (width x height)",
                        r.width,
                        r.height,
                        paths[0].display(),
                        width,
                        height
                    ),
                ));
            }
            total = match (total, r.len()) {
                (Some(a), Some(b)) => Some(a + b),
                _ => None,
            };
        }
        Ok(FrameStack {
            paths: paths.to_vec(),
            current: Some(first),
            file: 0,
            width,
            height,
            kind,
            total,
            reject_blank: true,
        })
    }

    pub fn width(&self) -> usize {
        self.width
    }
    pub fn height(&self) -> usize {
        self.height
    }
    /// Pixel type of the first file.
    pub fn kind(&self) -> PixelKind {
        self.kind
    }
    /// Total number of frames, when every file tells it up front.
    pub fn len(&self) -> Option<usize> {
        self.total
    }
    /// True when the stack is known to be empty.
    pub fn is_empty(&self) -> bool {
        self.total == Some(0)
    }
    /// The files of the stack.
    pub fn paths(&self) -> &[PathBuf] {
        &self.paths
    }
    /// Allow all-zero frames (default: an all-zero frame is an error).
    pub fn allow_blank(mut self) -> Self {
        self.reject_blank = false;
        self
    }

    /// Read the next frame into `buf`; None at the end of the last file.
    pub fn read_next(&mut self, buf: &mut [f32]) -> Result<Option<FrameOrigin>> {
        loop {
            let Some(r) = self.current.as_mut() else {
                return Ok(None);
            };
            let idx = r.position();
            if r.read_next(buf)? {
                let origin = FrameOrigin {
                    file: self.file,
                    frame: idx,
                };
                self.check(buf, &origin)?;
                return Ok(Some(origin));
            }
            self.file += 1;
            self.current = None;
            if self.file < self.paths.len() {
                let p = &self.paths[self.file];
                let r = FrameReader::open(p)?;
                if (r.width, r.height) != (self.width, self.height) {
                    return Err(Error::frame(
                        p,
                        Some(0),
                        format!(
                            "frame is {}x{} pixels, the stack's frames {}x{}",
                            r.width, r.height, self.width, self.height
                        ),
                    ));
                }
                self.current = Some(r);
            }
        }
    }

    fn check(&self, buf: &[f32], o: &FrameOrigin) -> Result<()> {
        let path = &self.paths[o.file];
        if let Some(i) = buf.iter().position(|v| !v.is_finite()) {
            return Err(Error::frame(
                path,
                Some(o.frame),
                format!(
                    "pixel (x {}, y {}) is {} (not a finite number)",
                    i % self.width,
                    i / self.width,
                    buf[i]
                ),
            ));
        }
        if self.reject_blank && buf.iter().all(|&v| v == 0.0) {
            return Err(Error::frame(
                path,
                Some(o.frame),
                "every pixel is 0 (blank frame: camera not triggered?)",
            ));
        }
        Ok(())
    }
}

/// The mean of every frame in a file (a dark or reference frame), with its size.
pub fn mean_frame(path: &Path) -> Result<(Vec<f64>, usize, usize)> {
    let mut r = FrameReader::open(path)?;
    let (w, h) = (r.width(), r.height());
    let mut buf = vec![0f32; w * h];
    let mut sum = vec![0f64; w * h];
    let mut n = 0usize;
    while r.read_next(&mut buf)? {
        if let Some(i) = buf.iter().position(|v| !v.is_finite()) {
            return Err(Error::frame(
                path,
                Some(n),
                format!("pixel {i} is {} (not a finite number)", buf[i]),
            ));
        }
        for (s, &v) in sum.iter_mut().zip(&buf) {
            *s += v as f64;
        }
        n += 1;
    }
    if n == 0 {
        return Err(Error::frame(path, None, "file holds no frame"));
    }
    let inv = 1.0 / n as f64;
    sum.iter_mut().for_each(|s| *s *= inv);
    Ok((sum, w, h))
}
