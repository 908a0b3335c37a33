//! NPY stacks `(frames, height, width)` (or one `(height, width)` frame) of u1/u2/u4/f4/f8 in
//! either byte order, C order; each frame is read from its own file offset, so the file is
//! never read whole. The header is parsed here (NPY format 1.0-3.0).
use super::PixelKind;
use crate::error::{Error, Result};
use std::fs::File;
use std::io::{BufReader, Read, Seek, SeekFrom};
use std::path::Path;

pub(super) struct NpyFrames {
    file: BufReader<File>,
    data_offset: u64,
    big_endian: bool,
    item: usize,
    raw: Vec<u8>,
    pub width: usize,
    pub height: usize,
    pub count: usize,
    pub kind: PixelKind,
}

/// The header of an NPY file holding an array of `shape` with dtype `descr` (e.g. "<u2"),
/// padded so the data starts at a multiple of 64 bytes (format 1.0).
pub fn npy_header(descr: &str, shape: &[usize]) -> Vec<u8> {
    let dims: Vec<String> = shape.iter().map(|d| d.to_string()).collect();
    let shape_txt = if shape.len() == 1 {
        format!("({},)", dims[0])
    } else {
        format!("({})", dims.join(", "))
    };
    let mut dict =
        format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape_txt}, }}");
    let total = 10 + dict.len() + 1;
    let pad = (64 - total % 64) % 64;
    dict.push_str(&" ".repeat(pad));
    dict.push('\n');
    let mut h = b"\x93NUMPY\x01\x00".to_vec();
    h.extend_from_slice(&(dict.len() as u16).to_le_bytes());
    h.extend_from_slice(dict.as_bytes());
    h
}

fn value_of<'a>(dict: &'a str, key: &str) -> Option<&'a str> {
    let k = format!("'{key}'");
    let at = dict.find(&k)? + k.len();
    let rest = dict[at..].trim_start().strip_prefix(':')?.trim_start();
    Some(rest)
}

impl NpyFrames {
    pub fn open(path: &Path) -> Result<NpyFrames> {
        let bad = |r: String| Error::frame(path, None, r);
        let f = File::open(path).map_err(|e| Error::io(path, e))?;
        let file_len = f.metadata().map_err(|e| Error::io(path, e))?.len();
        let mut file = BufReader::new(f);
        let mut magic = [0u8; 8];
        file.read_exact(&mut magic)
            .map_err(|_| bad("too short for an NPY file".into()))?;
        if &magic[..6] != b"\x93NUMPY" {
            return Err(bad("not an NPY file (magic string missing)".into()));
        }
        let hlen = match magic[6] {
            1 => {
                let mut b = [0u8; 2];
                file.read_exact(&mut b).map_err(|e| bad(e.to_string()))?;
                u16::from_le_bytes(b) as usize
            }
            2 | 3 => {
                let mut b = [0u8; 4];
                file.read_exact(&mut b).map_err(|e| bad(e.to_string()))?;
                u32::from_le_bytes(b) as usize
            }
            v => return Err(bad(format!("NPY format version {v} is not known"))),
        };
        let prefix = if magic[6] == 1 { 10 } else { 12 };
        if hlen > 1 << 20 {
            return Err(bad(format!("NPY header of {hlen} bytes is implausible")));
        }
        let mut hb = vec![0u8; hlen];
        file.read_exact(&mut hb)
            .map_err(|_| bad("NPY header truncated".into()))?;
        let dict = String::from_utf8_lossy(&hb).to_string();
        let descr = value_of(&dict, "descr")
            .and_then(|v| v.strip_prefix('\''))
            .and_then(|v| v.split('\'').next())
            .ok_or_else(|| bad(format!("NPY header without descr: {dict}")))?;
        let fortran = value_of(&dict, "fortran_order")
            .map(|v| v.starts_with("True"))
            .unwrap_or(false);
        if fortran {
            return Err(bad(
                "Fortran-ordered NPY arrays are not supported; save with \
                 numpy.ascontiguousarray"
                    .into(),
            ));
        }
        let shape_txt = value_of(&dict, "shape")
            .and_then(|v| v.strip_prefix('('))
            .and_then(|v| v.split(')').next())
            .ok_or_else(|| bad(format!("NPY header without shape: {dict}")))?;
        let shape: Vec<usize> = shape_txt
            .split(',')
            .map(str::trim)
            .filter(|s| !s.is_empty())
            .map(|s| s.parse::<usize>())
            .collect::<std::result::Result<_, _>>()
            .map_err(|_| bad(format!("NPY shape ({shape_txt}) does not parse")))?;
        let (count, height, width) = match shape.as_slice() {
            [h, w] => (1, *h, *w),
            [n, h, w] => (*n, *h, *w),
            _ => {
                return Err(bad(format!(
                    "NPY array of shape ({shape_txt}): expected (frames, height, width)"
                )))
            }
        };
        let (order, code) = descr.split_at(1);
        let big_endian = match order {
            ">" => true,
            "<" | "|" | "=" => false,
            _ => return Err(bad(format!("NPY dtype {descr:?} not supported"))),
        };
        let (kind, item) = match code {
            "u1" => (PixelKind::U8, 1),
            "u2" => (PixelKind::U16, 2),
            "u4" => (PixelKind::U32, 4),
            "f4" => (PixelKind::F32, 4),
            "f8" => (PixelKind::F64, 8),
            _ => {
                return Err(bad(format!(
                    "NPY dtype {descr:?} not supported: use uint8/16/32, float32 or float64"
                )))
            }
        };
        let data_offset = (prefix + hlen) as u64;
        let need = data_offset + (count * height * width * item) as u64;
        if file_len < need {
            let have =
                (file_len.saturating_sub(data_offset)) as usize / (height * width * item).max(1);
            return Err(Error::frame(
                path,
                Some(have),
                format!(
                    "file truncated: {file_len} bytes, the header's shape ({shape_txt}) needs {need}"
                ),
            ));
        }
        Ok(NpyFrames {
            file,
            data_offset,
            big_endian,
            item,
            raw: Vec::new(),
            width,
            height,
            count,
            kind,
        })
    }

    pub fn read(&mut self, idx: usize, out: &mut [f32]) -> std::result::Result<bool, String> {
        if idx >= self.count {
            return Ok(false);
        }
        let n = self.width * self.height;
        let bytes = n * self.item;
        self.raw.resize(bytes, 0);
        let off = self.data_offset + (idx * bytes) as u64;
        self.file
            .seek(SeekFrom::Start(off))
            .and_then(|_| self.file.read_exact(&mut self.raw))
            .map_err(|e| format!("cannot read frame data: {e}"))?;
        let be = self.big_endian;
        macro_rules! conv {
            ($t:ty, $k:expr) => {
                out.iter_mut()
                    .zip(self.raw.chunks_exact($k))
                    .for_each(|(o, b)| {
                        let a: [u8; $k] = b.try_into().unwrap();
                        *o = if be {
                            <$t>::from_be_bytes(a)
                        } else {
                            <$t>::from_le_bytes(a)
                        } as f32
                    })
            };
        }
        match self.kind {
            PixelKind::U8 => out
                .iter_mut()
                .zip(&self.raw)
                .for_each(|(o, &b)| *o = b as f32),
            PixelKind::U16 => conv!(u16, 2),
            PixelKind::U32 => conv!(u32, 4),
            PixelKind::F32 => conv!(f32, 4),
            PixelKind::F64 => conv!(f64, 8),
        }
        Ok(true)
    }
}
