//! TIFF frames: single- and multi-page greyscale, 8/16/32-bit unsigned or 32-bit float,
//! either byte order, strips or tiles (decoded by the `tiff` crate, one page at a time);
//! and a multi-page writer for 16-bit and 32-bit float frames.
use super::PixelKind;
use crate::error::{Error, Result};
use std::fs::File;
use std::io::{BufReader, BufWriter};
use std::path::Path;
use tiff::decoder::{Decoder, DecodingResult, Limits};
use tiff::encoder::{colortype, TiffEncoder};
use tiff::tags::Tag;
use tiff::ColorType;

type Dec = Decoder<BufReader<File>>;

pub(super) struct TiffFrames {
    dec: Dec,
    buf: DecodingResult,
    pub width: usize,
    pub height: usize,
    pub count: usize,
    pub kind: PixelKind,
    /// Index of the page the decoder stands on.
    at: usize,
}

fn open_decoder(path: &Path) -> Result<Dec> {
    let f = File::open(path).map_err(|e| Error::io(path, e))?;
    Decoder::new(BufReader::new(f))
        .map(|d| d.with_limits(Limits::unlimited()))
        .map_err(|e| Error::frame(path, Some(0), format!("not a readable TIFF: {e}")))
}

fn page_kind(dec: &mut Dec) -> std::result::Result<PixelKind, String> {
    let ct = dec.colortype().map_err(|e| e.to_string())?;
    let fmt: u16 = dec
        .find_tag_unsigned(Tag::SampleFormat)
        .map_err(|e| e.to_string())?
        .unwrap_or(1);
    match (ct, fmt) {
        (ColorType::Gray(8), 1) => Ok(PixelKind::U8),
        (ColorType::Gray(16), 1) => Ok(PixelKind::U16),
        (ColorType::Gray(32), 1) => Ok(PixelKind::U32),
        (ColorType::Gray(32), 3) => Ok(PixelKind::F32),
        (ColorType::Gray(64), 3) => Ok(PixelKind::F64),
        (ct, fmt) => Err(format!(
            "unsupported pixel type {ct:?} (sample format {fmt}): use greyscale 8/16/32-bit \
             unsigned or 32-bit float"
        )),
    }
}

fn page_dims(dec: &mut Dec) -> std::result::Result<(usize, usize), String> {
    let (w, h) = dec.dimensions().map_err(|e| e.to_string())?;
    Ok((w as usize, h as usize))
}

impl TiffFrames {
    pub fn open(path: &Path) -> Result<TiffFrames> {
        let mut dec = open_decoder(path)?;
        let (width, height) = page_dims(&mut dec).map_err(|r| Error::frame(path, Some(0), r))?;
        let kind = page_kind(&mut dec).map_err(|r| Error::frame(path, Some(0), r))?;
        // Count the pages by walking the IFD chain (tags only, no pixel data).
        let mut counter = open_decoder(path)?;
        let mut count = 1;
        while counter.more_images() {
            counter
                .next_image()
                .map_err(|e| Error::frame(path, Some(count), format!("broken page: {e}")))?;
            count += 1;
        }
        Ok(TiffFrames {
            dec,
            buf: DecodingResult::U16(Vec::new()),
            width,
            height,
            count,
            kind,
            at: 0,
        })
    }

    pub fn read(&mut self, idx: usize, out: &mut [f32]) -> std::result::Result<bool, String> {
        if idx >= self.count {
            return Ok(false);
        }
        if idx != self.at {
            self.dec
                .next_image()
                .map_err(|e| format!("cannot read page: {e}"))?;
            self.at += 1;
        }
        let (w, h) = page_dims(&mut self.dec)?;
        if (w, h) != (self.width, self.height) {
            return Err(format!(
                "page is {w}x{h} pixels, the first page {}x{} (mixed frame sizes)",
                self.width, self.height
            ));
        }
        page_kind(&mut self.dec)?;
        self.dec
            .read_image_to_buffer(&mut self.buf)
            .map_err(|e| format!("cannot decode pixel data (truncated or corrupt?): {e}"))?;
        let n = out.len();
        let short = |len: usize| {
            if len < n {
                Err(format!("page holds {len} values, expected {n}"))
            } else {
                Ok(())
            }
        };
        match &self.buf {
            DecodingResult::U8(v) => {
                short(v.len())?;
                out.iter_mut().zip(v).for_each(|(o, &x)| *o = x as f32)
            }
            DecodingResult::U16(v) => {
                short(v.len())?;
                out.iter_mut().zip(v).for_each(|(o, &x)| *o = x as f32)
            }
            DecodingResult::U32(v) => {
                short(v.len())?;
                out.iter_mut().zip(v).for_each(|(o, &x)| *o = x as f32)
            }
            DecodingResult::F32(v) => {
                short(v.len())?;
                out.copy_from_slice(&v[..n])
            }
            DecodingResult::F64(v) => {
                short(v.len())?;
                out.iter_mut().zip(v).for_each(|(o, &x)| *o = x as f32)
            }
            _ => return Err("unsupported sample type".into()),
        }
        Ok(true)
    }
}

enum Writer {
    Open(TiffEncoder<BufWriter<File>>),
    Done,
}

/// A multi-page TIFF written one frame at a time (little-endian, uncompressed strips).
pub struct TiffStackWriter {
    path: std::path::PathBuf,
    file: File,
    enc: Writer,
    frames: usize,
}

impl TiffStackWriter {
    /// Create (or truncate) the file.
    pub fn create(path: &Path) -> Result<TiffStackWriter> {
        let f = File::create(path).map_err(|e| Error::io(path, e))?;
        let file = f.try_clone().map_err(|e| Error::io(path, e))?;
        let enc = TiffEncoder::new(BufWriter::new(f))
            .map_err(|e| Error::Input(format!("{}: cannot write TIFF: {e}", path.display())))?;
        Ok(TiffStackWriter {
            path: path.to_path_buf(),
            file,
            enc: Writer::Open(enc),
            frames: 0,
        })
    }

    fn check(&self, w: usize, h: usize, len: usize) -> Result<()> {
        if w * h != len || w == 0 {
            return Err(Error::Input(format!(
                "{}: frame {} has {len} values for {w}x{h} pixels",
                self.path.display(),
                self.frames
            )));
        }
        Ok(())
    }

    fn err(&self, e: impl std::fmt::Display) -> Error {
        Error::Input(format!(
            "{}: cannot write frame {}: {e}",
            self.path.display(),
            self.frames
        ))
    }

    /// Append a 16-bit page.
    pub fn write_u16(&mut self, width: usize, height: usize, data: &[u16]) -> Result<()> {
        self.check(width, height, data.len())?;
        let r = match &mut self.enc {
            Writer::Open(e) => {
                e.write_image::<colortype::Gray16>(width as u32, height as u32, data)
            }
            Writer::Done => return Err(self.err("writer finished")),
        };
        r.map_err(|e| self.err(e))?;
        self.frames += 1;
        Ok(())
    }

    /// Append a 32-bit float page.
    pub fn write_f32(&mut self, width: usize, height: usize, data: &[f32]) -> Result<()> {
        self.check(width, height, data.len())?;
        let r = match &mut self.enc {
            Writer::Open(e) => {
                e.write_image::<colortype::Gray32Float>(width as u32, height as u32, data)
            }
            Writer::Done => return Err(self.err("writer finished")),
        };
        r.map_err(|e| self.err(e))?;
        self.frames += 1;
        Ok(())
    }

    /// Flush and close the file; returns the number of pages written.
    pub fn finish(mut self) -> Result<usize> {
        // Dropping the encoder flushes its buffer into the file; sync to surface errors.
        drop(std::mem::replace(&mut self.enc, Writer::Done));
        self.file.sync_all().map_err(|e| Error::io(&self.path, e))?;
        Ok(self.frames)
    }
}

/// Write 16-bit frames (each width * height values, row-major) as a multi-page TIFF.
pub fn write_tiff_u16(path: &Path, width: usize, height: usize, frames: &[&[u16]]) -> Result<()> {
    let mut w = TiffStackWriter::create(path)?;
    for f in frames {
        w.write_u16(width, height, f)?;
    }
    w.finish().map(|_| ())
}

/// Write 32-bit float frames (each width * height values, row-major) as a multi-page TIFF.
pub fn write_tiff_f32(path: &Path, width: usize, height: usize, frames: &[&[f32]]) -> Result<()> {
    let mut w = TiffStackWriter::create(path)?;
    for f in frames {
        w.write_f32(width, height, f)?;
    }
    w.finish().map(|_| ())
}
